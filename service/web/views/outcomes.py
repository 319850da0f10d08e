"""POST /v1/models/{name}/outcomes (ingest): what happened to scored cases.

JSON or CSV, all or nothing, checked here by the model's rules (the label as a
record's label); the use case joins each outcome with its case under the model
lock and stores it as a record (service/usecases/outcomes.py).
"""

from __future__ import annotations

from typing import Any

from flask import current_app, request

from service.errors import UnsupportedMediaError
from service.usecases.outcomes import CheckedOutcomes, ingest_outcomes
from service.usecases.predictions import find_model
from service.usecases.records import ModelChangedError
from service.web.auth import requires
from service.web.bodies import is_json_mimetype
from service.web.csv_outcomes import parse_csv_outcomes
from service.web.domain_metrics import count_received
from service.web.extensions import get_database, get_version_cache
from service.web.schemas.rules import RecordRules, rules_of
from service.web.schemas.views import IngestResultSchema
from service.web.views.base import Blueprint, read_json_body
from service.web.views.records import csv_text

blueprint = Blueprint("outcomes", __name__, url_prefix="/v1/models",
                      description="Outcomes of scored cases.")

OutcomeBatchSchema = RecordRules.any_model().outcome_batch_schema()
REQUEST_BODY = {
    "required": True,
    "content": {
        "application/json": {"schema": OutcomeBatchSchema},
        "text/csv": {"schema": {
            "type": "string",
            "description": "RFC 4180: a header row naming the columns `key` and `label` "
            "(any order), then one outcome per line."}},
    },
}


@blueprint.route("/<model:name>/outcomes", methods=["POST"])
@requires("ingest")
@blueprint.doc(requestBody=REQUEST_BODY)
@blueprint.response(201, IngestResultSchema)
def post_outcomes(name: str) -> dict[str, Any]:
    """Store what happened to scored cases: each becomes a labelled record (the
    case's features, this label) and is joined with the score served for it.
    Unknown keys are refused with 422 (`urn:keelson:problem:unknown-case`), a
    label other than the one stored with 409
    (`urn:keelson:problem:outcome-conflict`); the same outcome again counts as
    a duplicate."""
    limit = int(current_app.config["KEELSON_MAX_RECORDS_PER_REQUEST"])
    if request.mimetype == "text/csv":
        text = csv_text()
    elif is_json_mimetype(request.mimetype):
        body = read_json_body(request)
    else:
        raise UnsupportedMediaError(
            "Send outcomes as application/json or text/csv, not "
            f"{request.mimetype or 'without a media type'}.")
    cache = get_version_cache()
    entry = find_model(cache, name)
    rules = rules_of(entry)
    if request.mimetype == "text/csv":
        outcomes = parse_csv_outcomes(text, rules, max_outcomes=limit)
    else:
        outcomes = rules.load_outcomes(body, max_outcomes=limit)
    try:
        result = ingest_outcomes(get_database().write, name,
                                 CheckedOutcomes(entry.id, entry.spec, outcomes))
    except ModelChangedError:
        cache.forget(name)  # the client's retry is checked against the model as it is
        raise
    count_received(entry.name, result.accepted)
    return {"accepted": result.accepted, "duplicates": result.duplicates}
