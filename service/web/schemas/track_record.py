"""GET /v1/models/{name}/track-record: the window it reads and the answer it gives."""

from __future__ import annotations

from marshmallow import RAISE, Schema, fields

from service.usecases.track_record_summary import DEFAULT_WINDOW_DAYS, MAX_WINDOW_DAYS


class TrackRecordQuerySchema(Schema):
    """The window: UTC days of the outcome, both included (defaults and the
    longest window: service.usecases.track_record_summary.resolve_window)."""

    class Meta:
        unknown = RAISE

    since = fields.Date(metadata={
        "description": f"First UTC day (YYYY-MM-DD); default {DEFAULT_WINDOW_DAYS - 1} days "
        "before `until`."})
    until = fields.Date(metadata={
        "description": "Last UTC day (YYYY-MM-DD); default today. A longer window than "
        f"{MAX_WINDOW_DAYS} days is cut to the {MAX_WINDOW_DAYS} ending here; a reversed "
        "one reads no day."})


def _number() -> fields.Float:
    return fields.Float(required=True, allow_none=True)


class AlarmViewSchema(Schema):
    state = fields.String(required=True, metadata={
        "enum": ["calm", "raised"],
        "description": "`raised` once the Page-Hinkley test saw the loss move up (it stays "
        "raised for that version); `calm` otherwise."})
    since = fields.DateTime(required=True, allow_none=True, metadata={
        "description": "When raised: the time of the outcome that raised it."})
    cases = fields.Integer(required=True, metadata={
        "description": "Outcomes the test has seen for this version, all time."})
    statistic = fields.Float(required=True)
    delta = fields.Float(required=True)
    threshold = fields.Float(required=True)
    loss = fields.String(required=True, metadata={"enum": ["brier", "relative_absolute_error"]})


class CalibrationBinSchema(Schema):
    lower = fields.Float(required=True)
    upper = fields.Float(required=True)
    count = fields.Integer(required=True)
    mean_predicted = _number()
    observed_rate = _number()


class DailyValueSchema(Schema):
    day = fields.String(required=True)
    n = fields.Integer(required=True)
    value = _number()


class VersionTrackRecordSchema(Schema):
    version = fields.Integer(required=True)
    active = fields.Boolean(required=True)
    metrics = fields.Dict(keys=fields.String(), values=fields.Float(), required=True, metadata={
        "description": "n; classification: accuracy, log_loss, brier, roc_auc (binary, once "
        "both classes occurred); regression: rmse, mae, r2 (from 2 outcomes)."})
    calibration = fields.List(fields.Nested(CalibrationBinSchema), required=True)
    daily = fields.List(fields.Nested(DailyValueSchema), required=True)
    alarm = fields.Nested(AlarmViewSchema, required=True)


class TrackRecordSchema(Schema):
    model = fields.String(required=True)
    task = fields.String(required=True)
    since = fields.String(required=True)
    until = fields.String(required=True)
    main_metric = fields.String(required=True, metadata={"enum": ["log_loss", "rmse"]})
    versions = fields.List(fields.Nested(VersionTrackRecordSchema), required=True)
    active_version = fields.Integer(required=True, allow_none=True)
    alarm = fields.Nested(AlarmViewSchema, required=True, allow_none=True)
