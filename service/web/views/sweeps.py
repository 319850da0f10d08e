"""POST /v1/models/{name}/sweeps (predict): how one record's output moves as
each numeric field moves across its range (individual conditional expectation)."""

from __future__ import annotations

from typing import Any

from marshmallow import ValidationError

from service.errors import InvalidInputError
from service.usecases.predictions import find_model
from service.usecases.sweeps import DEFAULT_POINTS, sweep_record
from service.web.auth import requires
from service.web.extensions import get_version_cache
from service.web.schemas.predictions import prediction_readers
from service.web.schemas.sweeps import SweepAnswerSchema, SweepRequestSchema
from service.web.views.base import Blueprint

blueprint = Blueprint("sweeps", __name__, url_prefix="/v1/models",
                      description="Sweeps of one record over its numeric fields.")


@blueprint.route("/<model:name>/sweeps", methods=["POST"])
@requires("predict")
@blueprint.arguments(SweepRequestSchema)
@blueprint.response(200, SweepAnswerSchema)
def post_sweeps(body: dict[str, Any], name: str) -> dict[str, Any]:
    """Score the record with each numeric field set, in turn, to evenly spaced
    values across its declared range (the learned mean -/+ 3 SDs where no
    bound is declared), the other fields as given: one batch through the
    version's network. Answers per field the x values and the outputs."""
    cache = get_version_cache()
    entry = find_model(cache, name)
    readers = prediction_readers(entry)
    errors: dict[str, list[str]] = {}
    row: dict[str, Any] = {}
    try:
        row = readers.body_features.load(body["features"])
    except ValidationError as exc:
        messages = exc.messages if isinstance(exc.messages, dict) else {"": exc.messages}
        errors.update({f"features.{key}".rstrip("."): list(value) if isinstance(value, list)
                       else [str(value)] for key, value in messages.items()})
    output = None
    if "output" in body:
        if readers.output_json is None:
            errors["output"] = ["A regression model has one output; omit output."]
        else:
            try:
                output = readers.output_json.deserialize(body["output"])
            except ValidationError as exc:
                errors["output"] = [str(m) for m in exc.messages] if isinstance(
                    exc.messages, list) else [str(exc.messages)]
    if errors:
        raise InvalidInputError("The request is invalid.", errors=errors)
    return sweep_record(cache, entry, row, fields=body.get("fields_"),
                        points=body.get("points", DEFAULT_POINTS), output=output,
                        version=body.get("version"))
