"""/v1/models: create, change settings and delete (admin), list, show and
publish a model's own schema (predict)."""

from __future__ import annotations

import functools
from collections.abc import Callable
from typing import Any

from flask import current_app, request
from marshmallow import RAISE

from service.errors import InvalidInputError
from service.usecases import deletion, models, settings
from service.usecases.model_limits import ModelLimits, spec_bytes_error
from service.usecases.predictions import find_model
from service.web.auth import filters_by_model, requires, token_models, token_name
from service.web.extensions import get_database, get_version_cache
from service.web.schemas.json_schema import limits, model_documents
from service.web.schemas.paging import ModelPageSchema
from service.web.schemas.rules import rules_of
from service.web.schemas.settings import ModelPatchSchema
from service.web.schemas.spec import ModelSpecSchema
from service.web.schemas.views import (
    DeleteModelQuerySchema,
    JobEnvelopeSchema,
    ModelDocumentsSchema,
    ModelListSchema,
    ModelSchema,
)
from service.web.views.base import Blueprint

blueprint = Blueprint("models", __name__, url_prefix="/v1/models", description="Models.")


def _spec_bytes_bounded(view: Callable[..., Any]) -> Callable[..., Any]:
    """Refuse a spec over KEELSON_MAX_SPEC_BYTES before it is parsed (a
    megabyte of levels would cost seconds to validate only to be refused)."""

    @functools.wraps(view)
    def bounded(*args: Any, **kwargs: Any) -> Any:
        limits = ModelLimits.from_config(current_app.config)
        problem = spec_bytes_error(len(request.get_data(cache=True)), limits)
        if problem is not None:
            raise InvalidInputError("The model is larger than this server allows.",
                                    errors={"body": [problem]})
        return view(*args, **kwargs)

    return bounded


@blueprint.route("", methods=["POST"])
@requires("admin")
@_spec_bytes_bounded
@blueprint.arguments(ModelSpecSchema)
@blueprint.response(201, ModelSchema)
def create_model(spec: dict[str, Any]) -> dict[str, Any]:
    """Create a model from its spec (size limits: docs/http-api.md, "Models")."""
    created = models.create_model(get_database(), spec,
                                  ModelLimits.from_config(current_app.config), token=token_name())
    get_version_cache().forget(spec["name"])  # this process serves it at once, not after max_age
    return created


@blueprint.route("", methods=["GET"])
@requires("predict")
@filters_by_model
@blueprint.arguments(ModelPageSchema, location="query", as_kwargs=True, unknown=RAISE)
@blueprint.response(200, ModelListSchema)
def list_models(limit: int, after: str | None = None) -> dict[str, Any]:
    """The models, by name, a page at a time (follow `next`); a token limited to
    models sees only those."""
    page, following = models.list_models(get_database(), limit=limit, after=after,
                                         only=token_models())
    return {"models": page, "next": following}


@blueprint.route("/<model:name>", methods=["GET"])
@requires("predict")
@blueprint.response(200, ModelSchema)
def get_model(name: str) -> dict[str, Any]:
    """One model: spec, active version, record counts and trainer position."""
    return models.get_model(get_database(), name)


@blueprint.route("/<model:name>", methods=["DELETE"])
@requires("admin")
@blueprint.arguments(DeleteModelQuerySchema, location="query", as_kwargs=True, unknown=RAISE)
@blueprint.response(202, JobEnvelopeSchema, headers={"Location": {"schema": {"type": "string"}}})
def delete_model(name: str, confirm: str | None = None
                 ) -> tuple[dict[str, Any], dict[str, str]]:
    """Delete the model, its records, cases, versions and jobs (give the name
    twice: `?confirm=` repeats it). It is gone at once; a job removes its rows:
    follow the Location header. Asking again answers with the same job."""
    # Once, and equal: several confirms are not a choice among names.
    if confirm != name or len(request.args.getlist("confirm")) > 1:
        raise InvalidInputError(
            "Deleting a model needs its name twice: add ?confirm= with the model's name.",
            errors={"query.confirm": ["Must be given once, equal to the model's name."]})
    job = deletion.request_delete(get_database(), name)
    get_version_cache().forget(name)  # this process serves it no more, now
    return {"job": job}, {"Location": f"/v1/jobs/{job['id']}"}


@blueprint.route("/<model:name>", methods=["PATCH"])
@requires("admin")
@_spec_bytes_bounded
@blueprint.arguments(ModelPatchSchema)
@blueprint.response(200, ModelSchema)
def change_model(changes: dict[str, Any], name: str) -> dict[str, Any]:
    """Change settings that keep the network and the fields: promotion,
    training options for the steps and retrains to come, checkpoint interval,
    alarm. They apply from the record after the model's last one now (the
    history's `at_seq`); fields, classes, layers, activation, task or target
    answer 422 (a new model is needed)."""
    reason = changes.pop("reason", None)
    settings.change_settings(get_database(), name, changes,
                             ModelLimits.from_config(current_app.config),
                             token=token_name(), reason=reason)
    get_version_cache().forget(name)  # this process reads the new settings at once
    return models.get_model(get_database(), name)


@blueprint.route("/<model:name>/schema", methods=["GET"])
@requires("predict")
@blueprint.response(200, ModelDocumentsSchema)
def get_model_schema(name: str) -> dict[str, Any]:
    """JSON Schema 2020-12 documents of this model's record, prediction request and
    outcome, generated from the rules the API checks them with."""
    entry = find_model(get_version_cache(), name)
    documents: dict[str, Any] | None = entry.derived.get("json_schemas")
    if documents is None:
        documents = model_documents(entry.name, rules_of(entry), **limits(current_app.config))
        entry.derived["json_schemas"] = documents
    return documents
