"""/v1/models/{name}/records/forget (admin): forget records by key."""

from __future__ import annotations

from typing import Any

from marshmallow import RAISE

from service.usecases.forgetting import forget_records
from service.web.auth import requires, token_name
from service.web.extensions import get_database
from service.web.schemas.forget import ForgetAnswerSchema, ForgetQuerySchema, ForgetRequestSchema
from service.web.views.base import Blueprint

blueprint = Blueprint("forget", __name__, url_prefix="/v1/models",
                      description="Forgetting records.")


@blueprint.route("/<model:name>/records/forget", methods=["POST"])
@requires("admin")
@blueprint.arguments(ForgetQuerySchema, location="query", as_kwargs=True, unknown=RAISE)
@blueprint.arguments(ForgetRequestSchema)
@blueprint.response(200, ForgetAnswerSchema)
def forget(body: dict[str, Any], name: str, retrain: bool = False) -> dict[str, Any]:
    """Remove the records and scored cases (with their outcomes) these keys
    name, in one transaction; mark every version trained on them; with
    `?retrain=true`, queue a retrain from scratch without them. The active
    version keeps serving until another is promoted: the answer's `message`
    and the history's `records_forgotten` event say so. Keys found nowhere
    are counted as absent, not refused; asking again changes nothing."""
    return forget_records(get_database(), name, body["keys"], token=token_name(),
                          reason=body.get("reason"), retrain=retrain)
