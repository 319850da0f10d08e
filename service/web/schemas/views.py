"""Schemas of what the API answers, and of the bodies it documents generically.

These document the answers in the OpenAPI document and shape them on the way
out (flask-smorest dumps each view's return value through its schema).
"""

from __future__ import annotations

import datetime as dt

from marshmallow import RAISE, Schema, fields, validate

from service.usecases.exports import EXPORT_FORMATS
from service.usecases.record_export import RECORD_FORMATS
from service.web.schemas.fields import IntegerFromText, StrictBoolean
from service.web.schemas.history import reason_field
from service.web.schemas.paging import NEXT
from service.web.schemas.rules import RecordRules, batch_schema_class
from service.web.schemas.spec import ModelSpecSchema


class RecordCountsSchema(Schema):
    total = fields.Integer(required=True)
    train = fields.Integer(required=True)
    holdout = fields.Integer(required=True)


class TrainerStateSchema(Schema):
    cursor = fields.Integer(required=True, metadata={"description": "Last applied sequence."})
    lag = fields.Integer(required=True, metadata={"description": "Records not yet applied."})
    error = fields.String(metadata={
        "description": "Present when the model cannot be trained: why. Records then wait; "
        "the active version keeps serving. With `retry_at`, the worker could not load or "
        "train the model (a damaged spec, record or snapshot, an unexpected failure) and "
        "tries again then, waiting twice as long after each failed try; without it, the "
        "online lineage stopped (e.g. a non-finite loss) until a version of another "
        "lineage is promoted."})
    retry_at = fields.DateTime(metadata={
        "description": "When the worker tries this model again (with `error`)."})
    paused = fields.Boolean(required=True, metadata={
        "description": "Whether an admin paused online training: records are still "
                       "stored (lag grows) and predictions served."})
    paused_at = fields.DateTime(metadata={"description": "Since when (when paused)."})


class ModelSchema(ModelSpecSchema):
    """A stored model: its full spec (defaults filled) and its state."""

    classes = fields.Raw(allow_none=True)  # type: ignore[assignment]  # null for regression
    active_version = fields.Integer(allow_none=True, required=True)
    records = fields.Nested(RecordCountsSchema, required=True)
    trainer = fields.Nested(TrainerStateSchema, required=True)
    created_at = fields.DateTime(required=True)
    reserved_name_clashes = fields.List(fields.String(), metadata={
        "description": "Only for a model stored before one of its feature names was "
        "reserved: those features (named like a query parameter of GET predictions). "
        "The feature wins in the query string; send the hidden option or case key in a "
        "POST body."})


class ModelListSchema(Schema):
    """A page of models, by name (service/web/schemas/paging.py)."""

    models = fields.List(fields.Nested(ModelSchema), required=True)
    next = fields.String(required=True, allow_none=True, metadata=NEXT)


# The ingest body as the document states it: generated from the rules every
# model shares (each model publishes its own at GET /v1/models/{name}/schema).
RecordBatchSchema = batch_schema_class(fields.Nested(RecordRules.any_model().record_schema()))


class ModelDocumentsSchema(Schema):
    """GET /v1/models/{name}/schema: one model's own JSON Schema documents."""

    model = fields.String(required=True)
    record = fields.Dict(required=True, metadata={
        "description": "JSON Schema 2020-12 of one labelled record of this model."})
    prediction_request = fields.Dict(required=True, metadata={
        "description": "JSON Schema 2020-12 of the body of POST .../predictions."})
    outcome = fields.Dict(required=True, metadata={
        "description": "JSON Schema 2020-12 of an outcome: a case key and its label."})


class IngestResultSchema(Schema):
    accepted = fields.Integer(required=True)
    duplicates = fields.Integer(required=True)


class VersionSchema(Schema):
    number = fields.Integer(required=True)
    origin = fields.String(required=True, metadata={"enum": ["online", "retrain"]})
    status = fields.String(required=True, metadata={"enum": ["active", "candidate", "retired"]})
    records_seen = fields.Integer(required=True)
    cursor = fields.Integer(required=True)
    metrics = fields.Dict(required=True)
    created_at = fields.DateTime(required=True)
    promoted_at = fields.DateTime(allow_none=True, required=True)
    parent = fields.Integer(allow_none=True, required=True,
                            metadata={"description": "Number of the version it grew from."})
    settings_from_seq = fields.Integer(allow_none=True, required=True, metadata={
        "description": "The record position of the settings change it was trained under "
                       "(its `at_seq` in the model's history; 0: the settings it was created "
                       "with; null: made before settings could change)."})
    forgotten_records = fields.Integer(required=True, metadata={
        "description": "How many records this version was trained on (itself or through "
                       "the versions it grew from) that have since been forgotten "
                       "(POST .../records/forget): its weights still carry them. 0: none."})


class VersionListSchema(Schema):
    """A page of a model's versions, oldest first (service/web/schemas/paging.py)."""

    versions = fields.List(fields.Nested(VersionSchema), required=True)
    next = fields.Integer(required=True, allow_none=True, metadata=NEXT)


class ExportQuerySchema(Schema):
    """GET /v1/models/{name}/versions/{number}/export query."""

    class Meta:
        unknown = RAISE

    format = fields.String(required=True, validate=validate.OneOf(EXPORT_FORMATS),
                           metadata={"description": "The file format: `onnx` or `snapshot`."})


class RecordExportQuerySchema(Schema):
    """GET /v1/models/{name}/records query: which records, in which format."""

    class Meta:
        unknown = RAISE

    format = fields.String(validate=validate.OneOf(RECORD_FORMATS), metadata={
        "description": "`csv` or `ndjson`; without it the `Accept` header decides "
                       "(text/csv or application/x-ndjson; NDJSON when either will do)."})
    after = IntegerFromText(minimum=0, maximum=2**63 - 1, load_default=0, metadata={
        "description": "Records with a sequence above this (the last `sequence` read: "
                       "the cursor to go on from)."})
    limit = IntegerFromText(minimum=1, maximum=2**63 - 1, metadata={
        "description": "At most this many records (default: all)."})
    split = fields.String(validate=validate.OneOf(["train", "holdout"]), metadata={
        "description": "Only the records of this split."})
    since = fields.AwareDateTime(default_timezone=dt.UTC, metadata={
        "description": "Only records received at or after this time (RFC 3339; UTC "
                       "without an offset)."})
    until = fields.AwareDateTime(default_timezone=dt.UTC, metadata={
        "description": "Only records received before this time."})


class RetrainRequestSchema(Schema):
    class Meta:
        unknown = RAISE

    warm_start = StrictBoolean(load_default=False)
    reason = reason_field()


class DeleteModelQuerySchema(Schema):
    """DELETE /v1/models/{name} query."""

    class Meta:
        unknown = RAISE

    confirm = fields.String(required=True, metadata={
        "description": "The model's name again, once: a delete needs the name twice "
                       "(any other value is refused with 422)."})


class JobSchema(Schema):
    id = fields.Integer(required=True)
    model = fields.String(required=True)
    kind = fields.String(required=True)
    status = fields.String(
        required=True, metadata={"enum": ["queued", "running", "succeeded", "failed"]}
    )
    progress = fields.Dict(allow_none=True, required=True)
    version = fields.Integer(allow_none=True, required=True)
    error = fields.String(allow_none=True, required=True)
    created_at = fields.DateTime(required=True)
    started_at = fields.DateTime(allow_none=True, required=True)
    finished_at = fields.DateTime(allow_none=True, required=True)


class JobEnvelopeSchema(Schema):
    job = fields.Nested(JobSchema, required=True)


class StatusSchema(Schema):
    status = fields.String(required=True)


class ProblemSchema(Schema):
    """RFC 9457 problem details."""

    type = fields.String(required=True)
    title = fields.String(required=True)
    status = fields.Integer(required=True)
    detail = fields.String(required=True)
    errors = fields.Dict(
        keys=fields.String(), values=fields.List(fields.String()),
        metadata={"description": "Field path -> messages, for invalid input: the first "
                  "100 paths, each with its first 3 messages."},
    )
    errors_omitted = fields.Integer(metadata={
        "description": "How many more field paths were at fault than `errors` lists."})
    budget = fields.Integer(metadata={
        "description": "`urn:keelson:problem:over-budget`: the budget units a prediction "
        "request may cost (KEELSON_PREDICTION_BUDGET)."})
    cost = fields.Integer(metadata={
        "description": "`urn:keelson:problem:over-budget`: what the request would cost: "
        "records x (rows evaluated per record + 8) x (parameters + 100 x units) + 500 x "
        "the bytes its answer may take."})
    deadline_seconds = fields.Float(metadata={
        "description": "`urn:keelson:problem:deadline-exceeded`: the deadline that passed."})
