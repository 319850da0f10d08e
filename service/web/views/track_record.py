"""/v1/models/{name}/track-record: how the served scores fared (predict)."""

from __future__ import annotations

import datetime as dt
from typing import Any

from marshmallow import RAISE

from service.usecases import track_record_summary
from service.web.auth import requires
from service.web.extensions import get_database
from service.web.schemas.track_record import TrackRecordQuerySchema, TrackRecordSchema
from service.web.views.base import Blueprint

blueprint = Blueprint("track_record", __name__, url_prefix="/v1/models",
                      description="Live metrics of the served scores.")


@blueprint.route("/<model:name>/track-record", methods=["GET"])
@requires("predict")
@blueprint.arguments(TrackRecordQuerySchema, location="query", as_kwargs=True, unknown=RAISE)
@blueprint.response(200, TrackRecordSchema)
def get_track_record(name: str, since: dt.date | None = None, until: dt.date | None = None
                     ) -> dict[str, Any]:
    """Per version, metrics, calibration and a daily series over the outcomes
    received in a window of UTC days (default the last 30), and the change alarm."""
    since, until = track_record_summary.resolve_window(since, until,
                                                       dt.datetime.now(dt.UTC).date())
    return track_record_summary.track_record(get_database(), name, since, until)
