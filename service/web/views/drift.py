"""GET /v1/models/{name}/drift (predict): recent predictions' fields against the
active version's reference."""

from __future__ import annotations

from typing import Any

import orjson
from flask import Response
from marshmallow import RAISE

from service.usecases.drift import drift_report
from service.usecases.predictions import find_model
from service.web.auth import requires
from service.web.extensions import get_database, get_drift_references, get_version_cache
from service.web.schemas.drift import DriftQuerySchema, DriftSchema
from service.web.views.base import Blueprint

blueprint = Blueprint("drift", __name__, url_prefix="/v1/models", description="Drift.")


@blueprint.route("/<model:name>/drift", methods=["GET"])
@requires("predict")
@blueprint.arguments(DriftQuerySchema, location="query", as_kwargs=True, unknown=RAISE)
@blueprint.response(200, DriftSchema)
def get_drift(name: str, window_days: int) -> Response:
    """Per field, how far the predictions of the last `window_days` moved from
    the active version's reference (its last 10,000 training records): PSI and
    its status, KS (numeric) or chi-square (categorical, boolean), and the
    counts. Counts reach the answer within `KEELSON_DRIFT_FLUSH_SECONDS`."""
    entry = find_model(get_version_cache(), name)
    body: dict[str, Any] = drift_report(get_database(), get_drift_references(), entry,
                                        window_days)
    # Dumped by orjson, as predictions are: every number is finite (NaN is
    # answered as null by the use case); tests/service/test_drift_api.py
    # checks the body against DriftSchema.
    return Response(orjson.dumps(body), mimetype="application/json")
