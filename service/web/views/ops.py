"""Operations: liveness, readiness and the OpenAPI document; no token needed."""

from __future__ import annotations

import logging
from typing import Any

from flask import Response, current_app, jsonify

from service.errors import KeelsonError
from service.store.schema import schema_is_current
from service.web.auth import public
from service.web.extensions import get_database
from service.web.schemas.views import StatusSchema
from service.web.views.base import Blueprint

blueprint = Blueprint("ops", __name__, description="Operations.")
log = logging.getLogger(__name__)


class NotReadyError(KeelsonError):
    status = 503


@blueprint.route("/healthz", methods=["GET"])
@public
@blueprint.response(200, StatusSchema)
def healthz() -> dict[str, Any]:
    """The process is alive (no database call)."""
    return {"status": "ok"}


@blueprint.route("/readyz", methods=["GET"])
@public
@blueprint.response(200, StatusSchema)
def readyz() -> dict[str, Any]:
    """The database answers and its schema is the newest migration."""
    database = get_database()
    try:
        current = schema_is_current(database.engine)
    except Exception as exc:  # any failure to reach the database means not ready
        # The answer is public: what failed, and how, is for the log.
        log.warning("readiness: the database is unreachable: %s", type(exc).__name__)
        raise NotReadyError("The database is unreachable.") from exc
    if not current:
        raise NotReadyError("The database schema is not current; run `keelson db upgrade`.")
    return {"status": "ready"}


@blueprint.route("/openapi.json", methods=["GET"])
@public
@blueprint.doc(summary="This API's OpenAPI 3 document.", responses={"200": {
    "description": "OK", "content": {"application/json": {"schema": {"type": "object"}}}}})
def openapi_json() -> Response:
    return jsonify(current_app.extensions["keelson.openapi"]())
