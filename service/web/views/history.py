"""/v1/models/{name}/history (predict), and pause and resume (admin)."""

from __future__ import annotations

from typing import Any

from marshmallow import RAISE

from service.usecases import history
from service.web.auth import requires, token_name
from service.web.extensions import get_database
from service.web.schemas.history import (
    ActRequestSchema,
    HistoryPageSchema,
    HistorySchema,
    PauseStateSchema,
)
from service.web.views.base import Blueprint

blueprint = Blueprint("history", __name__, url_prefix="/v1/models",
                      description="A model's history; pausing its online training.")


@blueprint.route("/<model:name>/history", methods=["GET"])
@requires("predict")
@blueprint.arguments(HistoryPageSchema, location="query", as_kwargs=True, unknown=RAISE)
@blueprint.response(200, HistorySchema)
def get_history(name: str, limit: int, after: int | None = None) -> dict[str, Any]:
    """What happened to this model, oldest first, a page at a time (follow
    `next`): who (token name) and why (reason) for each admin act."""
    page, following = history.list_history(get_database(), name, limit=limit, after=after)
    return {"events": page, "next": following}


@blueprint.route("/<model:name>/pause", methods=["POST"])
@requires("admin")
@blueprint.arguments(ActRequestSchema, required=False)
@blueprint.response(200, PauseStateSchema)
def pause(body: dict[str, Any], name: str) -> dict[str, Any]:
    """Stop online training: records are still stored (lag grows) and
    predictions served. Pausing a paused model changes nothing."""
    return history.set_paused(get_database(), name, True, token=token_name(),
                              reason=body.get("reason"))


@blueprint.route("/<model:name>/resume", methods=["POST"])
@requires("admin")
@blueprint.arguments(ActRequestSchema, required=False)
@blueprint.response(200, PauseStateSchema)
def resume(body: dict[str, Any], name: str) -> dict[str, Any]:
    """Train again from where the trainer stopped. Resuming a running model
    changes nothing."""
    return history.set_paused(get_database(), name, False, token=token_name(),
                              reason=body.get("reason"))
