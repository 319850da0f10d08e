"""/v1/models/{name}/versions: list, show (predict), promote and export (admin)."""

from __future__ import annotations

from typing import Any

from flask import Response
from marshmallow import RAISE

from service.usecases import versions
from service.usecases.exports import ONNX_MEDIA_TYPE, export_version
from service.web.auth import requires, token_name
from service.web.extensions import get_database, get_version_cache
from service.web.schemas.history import ActRequestSchema
from service.web.schemas.paging import VersionPageSchema
from service.web.schemas.views import ExportQuerySchema, VersionListSchema, VersionSchema
from service.web.views.base import Blueprint

blueprint = Blueprint("versions", __name__, url_prefix="/v1/models", description="Versions.")


@blueprint.route("/<model:name>/versions", methods=["GET"])
@requires("predict")
@blueprint.arguments(VersionPageSchema, location="query", as_kwargs=True, unknown=RAISE)
@blueprint.response(200, VersionListSchema)
def list_versions(name: str, limit: int, after: int | None = None) -> dict[str, Any]:
    """A model's versions, oldest first, a page at a time (follow `next`)."""
    page, following = versions.list_versions(get_database(), name, limit=limit, after=after)
    return {"versions": page, "next": following}


@blueprint.route("/<model:name>/versions/<int:number>", methods=["GET"])
@requires("predict")
@blueprint.response(200, VersionSchema)
def get_version(name: str, number: int) -> dict[str, Any]:
    """One version."""
    return versions.get_version(get_database(), name, number)


@blueprint.route("/<model:name>/versions/<int:number>/promote", methods=["POST"])
@requires("admin")
@blueprint.arguments(ActRequestSchema, required=False)
@blueprint.response(200, VersionSchema)
def promote_version(body: dict[str, Any], name: str, number: int) -> dict[str, Any]:
    """Make this version the active one: also the way to roll back. The act and
    its reason (optional) go into the model's history."""
    return versions.promote_version(get_database(), name, number, token=token_name(),
                                    reason=body.get("reason"))


@blueprint.route("/<model:name>/versions/<int:number>/export", methods=["GET"])
@requires("admin")
@blueprint.arguments(ExportQuerySchema, location="query", as_kwargs=True, unknown=RAISE)
@blueprint.doc(responses={"200": {
    "description": "The version as an ONNX model (binary protobuf) or Keelson's snapshot "
                   "file (docs/http-api.md, docs/snapshot-format.md).",
    "content": {ONNX_MEDIA_TYPE: {"schema": {"type": "string", "format": "binary"}}}}})
def export(name: str, number: int, format: str) -> Response:
    """This version as a file for use outside Keelson: `format=onnx`, an ONNX
    model with the encoding inside (raw fields in, probabilities or the value
    out); `format=snapshot`, Keelson's own snapshot file, which `keelson
    restore` loads into another installation."""
    exported = export_version(get_version_cache(), get_database().read, name, number, format)
    response = Response(exported.data, mimetype=exported.media_type)
    response.headers["Content-Disposition"] = f'attachment; filename="{exported.filename}"'
    return response
