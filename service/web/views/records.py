"""POST /v1/models/{name}/records (ingest): JSON or CSV, all or nothing;
GET the same (admin): every stored record out, streamed as CSV or NDJSON.

The body is checked here, by the model's compiled rules (JSON and CSV into the
same shape, through the same rules); the use case stores what was checked,
under the model lock, after making sure the model is still the one checked
against. The model and its rules come from the version cache: a warm request
reads no database before its write.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

from flask import Response, current_app, request
from marshmallow import RAISE

from service.errors import MalformedError, NotAcceptableError, UnsupportedMediaError
from service.store.record_dump import RecordFilter
from service.usecases.predictions import find_model
from service.usecases.record_export import CSV_MEDIA_TYPE, NDJSON_MEDIA_TYPE, open_export
from service.usecases.records import CheckedRecords, ModelChangedError, ingest_records
from service.web.auth import requires
from service.web.bodies import is_json_mimetype, not_utf8
from service.web.csv_records import parse_csv_records
from service.web.extensions import get_database, get_version_cache
from service.web.schemas.rules import rules_of
from service.web.schemas.views import (
    IngestResultSchema,
    RecordBatchSchema,
    RecordExportQuerySchema,
)
from service.web.views.base import Blueprint, read_json_body

blueprint = Blueprint("records", __name__, url_prefix="/v1/models", description="Records.")

REQUEST_BODY = {
    "required": True,
    "content": {
        "application/json": {"schema": RecordBatchSchema},
        "text/csv": {
            "schema": {
                "type": "string",
                "description": "RFC 4180: a header row naming every feature, the target "
                "and optionally `key`, then one record per line.",
            }
        },
    },
}


@blueprint.route("/<model:name>/records", methods=["POST"])
@requires("ingest")
@blueprint.doc(requestBody=REQUEST_BODY)
@blueprint.response(201, IngestResultSchema)
def post_records(name: str) -> dict[str, Any]:
    """Store labelled records; duplicates by key are counted and change nothing."""
    limit = int(current_app.config["KEELSON_MAX_RECORDS_PER_REQUEST"])
    if request.mimetype == "text/csv":
        text = csv_text()
    elif is_json_mimetype(request.mimetype):
        body = read_json_body(request)
    else:
        raise UnsupportedMediaError(
            "Send records as application/json or text/csv, not "
            f"{request.mimetype or 'without a media type'}."
        )
    cache = get_version_cache()
    entry = find_model(cache, name)
    rules = rules_of(entry)
    if request.mimetype == "text/csv":
        records = parse_csv_records(text, entry.spec, rules=rules, max_records=limit)
    else:
        records = rules.load_batch(body, max_records=limit)
    try:
        result = ingest_records(get_database().write, name,
                                CheckedRecords(entry.id, entry.spec, records))
    except ModelChangedError:
        cache.forget(name)  # the client's retry is checked against the model as it is
        raise
    return {"accepted": result.accepted, "duplicates": result.duplicates}


def csv_text() -> str:
    charset = request.mimetype_params.get("charset", "utf-8").lower()
    if charset not in ("utf-8", "utf8"):
        raise UnsupportedMediaError("CSV bodies must be UTF-8.")
    try:
        return request.get_data().decode("utf-8")
    except UnicodeDecodeError as exc:  # strictly UTF-8: no lone surrogate gets in
        raise MalformedError(not_utf8("The CSV", exc, "RFC 3629")) from None


EXPORT_ANSWER = {"200": {
    "description": "Every matching record in sequence order, streamed (docs/http-api.md): "
                   "CSV with a header row, or one JSON object per line.",
    "content": {
        CSV_MEDIA_TYPE: {"schema": {"type": "string", "description": "RFC 4180: key, "
                         "record.sequence, record.split, record.time, the features, the "
                         "target."}},
        NDJSON_MEDIA_TYPE: {"schema": {"type": "string", "description": "One object a "
                            "line: key, sequence, split, time, fields, label."}},
    }}}


@blueprint.route("/<model:name>/records", methods=["GET"])
@requires("admin")
@blueprint.arguments(RecordExportQuerySchema, location="query", as_kwargs=True, unknown=RAISE)
@blueprint.doc(responses=EXPORT_ANSWER)
def get_records(name: str, after: int, format: str | None = None, limit: int | None = None,
                split: str | None = None, since: dt.datetime | None = None,
                until: dt.datetime | None = None) -> Response:
    """Every stored record of the model, in sequence order, streamed as CSV or
    NDJSON; page with `after` (the last sequence read) and `limit`."""
    chosen = format or negotiated_format()
    export = open_export(get_database().read, name, chosen,
                         RecordFilter(after=after, split=split, since=_utc(since),
                                      until=_utc(until)), limit=limit)
    response = Response(export.chunks(), mimetype=export.media_type)
    response.headers["Content-Disposition"] = f'attachment; filename="{export.filename}"'
    response.headers["Vary"] = "Accept"
    return response


def negotiated_format() -> str:
    """The format the ``Accept`` header prefers (RFC 9110 section 12.5.1);
    NDJSON when it names neither type above the other (or is absent)."""
    if not request.accept_mimetypes:
        return "ndjson"
    best = request.accept_mimetypes.best_match([NDJSON_MEDIA_TYPE, CSV_MEDIA_TYPE])
    if best is None:
        raise NotAcceptableError(
            f"Records are answered as {CSV_MEDIA_TYPE} or {NDJSON_MEDIA_TYPE}; the Accept "
            "header takes neither (or ask with format=csv or format=ndjson).")
    return "csv" if best == CSV_MEDIA_TYPE else "ndjson"


def _utc(moment: dt.datetime | None) -> dt.datetime | None:
    """In UTC, as stored; a time beyond what an offset can shift stays at the end."""
    if moment is None:
        return None
    try:
        return moment.astimezone(dt.UTC)
    except OverflowError:
        return (dt.datetime.min if moment.year == 1 else dt.datetime.max).replace(tzinfo=dt.UTC)
