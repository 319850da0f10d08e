"""/v1/models: create (admin), list and show (predict)."""

from __future__ import annotations

from typing import Any

from service.usecases import models
from service.web.auth import requires
from service.web.extensions import get_database
from service.web.schemas.spec import ModelSpecSchema
from service.web.schemas.views import ModelListSchema, ModelSchema
from service.web.views.base import Blueprint

blueprint = Blueprint("models", __name__, url_prefix="/v1/models", description="Models.")


@blueprint.route("", methods=["POST"])
@requires("admin")
@blueprint.arguments(ModelSpecSchema)
@blueprint.response(201, ModelSchema)
def create_model(spec: dict[str, Any]) -> dict[str, Any]:
    """Create a model from its spec."""
    return models.create_model(get_database(), spec)


@blueprint.route("", methods=["GET"])
@requires("predict")
@blueprint.response(200, ModelListSchema)
def list_models() -> dict[str, Any]:
    """Every model, by name."""
    return {"models": models.list_models(get_database())}


@blueprint.route("/<name>", methods=["GET"])
@requires("predict")
@blueprint.response(200, ModelSchema)
def get_model(name: str) -> dict[str, Any]:
    """One model: spec, active version, record counts and trainer position."""
    return models.get_model(get_database(), name)
