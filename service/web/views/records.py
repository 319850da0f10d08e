"""POST /v1/models/{name}/records (ingest): JSON or CSV, all or nothing."""

from __future__ import annotations

from typing import Any

from flask import current_app, request

from service.errors import InvalidInputError, MalformedError, UnsupportedMediaError
from service.usecases.common import find_model
from service.usecases.records import ingest_records
from service.web.auth import requires
from service.web.bodies import is_json_mimetype
from service.web.csv_records import parse_csv_records
from service.web.extensions import get_database
from service.web.schemas.views import IngestResultSchema, RecordBatchDocSchema
from service.web.views.base import Blueprint, read_json_body

blueprint = Blueprint("records", __name__, url_prefix="/v1/models", description="Records.")

REQUEST_BODY = {
    "required": True,
    "content": {
        "application/json": {"schema": RecordBatchDocSchema},
        "text/csv": {
            "schema": {
                "type": "string",
                "description": "RFC 4180: a header row naming every feature, the target "
                "and optionally `key`, then one record per line.",
            }
        },
    },
}


@blueprint.route("/<name>/records", methods=["POST"])
@requires("ingest")
@blueprint.doc(requestBody=REQUEST_BODY)
@blueprint.response(201, IngestResultSchema)
def post_records(name: str) -> dict[str, Any]:
    """Store labelled records; duplicates by key are counted and change nothing."""
    database = get_database()
    limit = int(current_app.config["KEELSON_MAX_RECORDS_PER_REQUEST"])
    if request.mimetype == "text/csv":
        records = _csv_records(name, limit)
    elif is_json_mimetype(request.mimetype):
        records = _json_records()
    else:
        raise UnsupportedMediaError(
            "Send records as application/json or text/csv, not "
            f"{request.mimetype or 'without a media type'}."
        )
    result = ingest_records(database.write, name, records, max_records=limit)
    return {"accepted": result.accepted, "duplicates": result.duplicates}


def _json_records() -> list[Any]:
    body = read_json_body(request)
    if not isinstance(body, dict):
        raise InvalidInputError("The body must be an object.",
                                errors={"body": ['Expected {"records": [...]}.']})
    errors = {key: ["Unknown field."] for key in body if key != "records"}
    records = body.get("records")
    if records is None:
        errors["records"] = ["Missing data for required field."]
    elif not isinstance(records, list):
        errors["records"] = ["Not a valid list."]
    if errors:
        raise InvalidInputError("The body is invalid; nothing was stored.", errors=errors)
    assert isinstance(records, list)
    return records


def _csv_records(name: str, limit: int) -> list[dict[str, Any]]:
    charset = request.mimetype_params.get("charset", "utf-8").lower()
    if charset not in ("utf-8", "utf8"):
        raise UnsupportedMediaError("CSV bodies must be UTF-8.")
    try:
        text = request.get_data().decode("utf-8")
    except UnicodeDecodeError as exc:
        raise MalformedError(f"The CSV is not UTF-8: {exc}") from exc
    with get_database().read() as session:
        spec = find_model(session, name).spec
    return parse_csv_records(text, spec, max_records=limit)
