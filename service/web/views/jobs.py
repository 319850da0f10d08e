"""POST /v1/models/{name}/retrain (admin) and GET /v1/jobs/{id} (predict)."""

from __future__ import annotations

from typing import Any

from service.usecases import jobs
from service.web.auth import filters_by_model, requires, token_models, token_name
from service.web.extensions import get_database
from service.web.schemas.views import JobEnvelopeSchema, JobSchema, RetrainRequestSchema
from service.web.views.base import Blueprint

blueprint = Blueprint("jobs", __name__, url_prefix="/v1", description="Retraining jobs.")


@blueprint.route("/models/<model:name>/retrain", methods=["POST"])
@requires("admin")
@blueprint.arguments(RetrainRequestSchema, required=False)
@blueprint.response(202, JobEnvelopeSchema, headers={"Location": {"schema": {"type": "string"}}})
def retrain(body: dict[str, Any], name: str) -> tuple[dict[str, Any], dict[str, str]]:
    """Queue a full retrain; follow the Location header to watch it."""
    job = jobs.request_retrain(get_database(), name, warm_start=body["warm_start"],
                               token=token_name(), reason=body.get("reason"))
    return {"job": job}, {"Location": f"/v1/jobs/{job['id']}"}


@blueprint.route("/jobs/<int:job_id>", methods=["GET"])
@requires("predict")
@filters_by_model
@blueprint.response(200, JobSchema)
def get_job(job_id: int) -> dict[str, Any]:
    """One job: status, progress, and the version it made."""
    return jobs.get_job(get_database(), job_id, only=token_models())
