"""POST /v1/models/{name}/sweeps (predict): how one record's output moves as
each numeric field moves across its range (individual conditional expectation)."""

from __future__ import annotations

from typing import Any

from flask import request
from marshmallow import ValidationError

from service.errors import InvalidInputError
from service.usecases.predictions import find_model
from service.usecases.sweeps import DEFAULT_POINTS, sweep_record
from service.web.auth import requires
from service.web.extensions import get_version_cache
from service.web.schemas.predictions import merge_messages, prediction_readers
from service.web.schemas.sweeps import SweepAnswerSchema, SweepRequestSchema
from service.web.views.base import Blueprint, read_json_body

blueprint = Blueprint("sweeps", __name__, url_prefix="/v1/models",
                      description="Sweeps of one record over its numeric fields.")


SWEEP_BODY = {"required": True,
              "content": {"application/json": {"schema": SweepRequestSchema}}}
# The request's shape; its features are then checked by the model's own rules.
_SHAPE = SweepRequestSchema(exclude=("features",))


@blueprint.route("/<model:name>/sweeps", methods=["POST"])
@requires("predict")
@blueprint.doc(requestBody=SWEEP_BODY)
@blueprint.response(200, SweepAnswerSchema)
def post_sweeps(name: str) -> dict[str, Any]:
    """Score the record with each numeric field set, in turn, to evenly spaced
    values across its declared range (the learned mean -/+ 3 SDs where no
    bound is declared), the other fields as given: one batch through the
    version's network. Answers per field the x values and the outputs."""
    cache = get_version_cache()
    entry = find_model(cache, name)  # an unknown model is 404 whatever the body
    given = read_json_body(request)
    if not isinstance(given, dict):
        raise InvalidInputError("The body must be an object.",
                                errors={"body": ['Expected {"features": {...}}.']})
    readers = prediction_readers(entry)
    errors: dict[str, list[str]] = {}
    body: dict[str, Any] = {}
    try:
        body = _SHAPE.load({k: v for k, v in given.items() if k != "features"})
    except ValidationError as exc:
        merge_messages(errors, exc.messages, "")
    row: dict[str, Any] = {}
    if "features" not in given:
        errors["features"] = ["Missing data for required field."]
    else:
        try:
            row = readers.body_features.load(given["features"])
        except ValidationError as exc:
            merge_messages(errors, exc.messages, "features")
    output = None
    if "output" in given:
        if readers.output_json is None:
            errors["output"] = ["A regression model has one output; omit output."]
        else:
            try:
                output = readers.output_json.deserialize(given["output"])
            except ValidationError as exc:
                errors["output"] = [str(m) for m in exc.messages] if isinstance(
                    exc.messages, list) else [str(exc.messages)]
    if errors:
        raise InvalidInputError("The request is invalid.", errors=errors)
    return sweep_record(cache, entry, row, fields=body.get("fields_"),
                        points=body.get("points", DEFAULT_POINTS), output=output,
                        version=body.get("version"))
