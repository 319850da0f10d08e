"""POST /v1/models/{name}/records (ingest): JSON or CSV, all or nothing.

The body is checked here, by the model's compiled rules (JSON and CSV into the
same shape, through the same rules); the use case stores what was checked,
under the model lock, after making sure the model is still the one checked
against. The model and its rules come from the version cache: a warm request
reads no database before its write.
"""

from __future__ import annotations

from typing import Any

from flask import current_app, request

from service.errors import MalformedError, UnsupportedMediaError
from service.usecases.predictions import find_model
from service.usecases.records import CheckedRecords, ModelChangedError, ingest_records
from service.web.auth import requires
from service.web.bodies import is_json_mimetype, not_utf8
from service.web.csv_records import parse_csv_records
from service.web.extensions import get_database, get_version_cache
from service.web.schemas.rules import rules_of
from service.web.schemas.views import IngestResultSchema, RecordBatchSchema
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
