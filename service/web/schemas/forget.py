"""POST /v1/models/{name}/records/forget: its body, query and answer."""

from __future__ import annotations

from typing import Any

from marshmallow import RAISE, Schema, fields, pre_load, validate

from service.errors import TooLargeError
from service.usecases.forgetting import MAX_FORGET_KEYS, SHOWN
from service.web.schemas.fields import BooleanFromText
from service.web.schemas.history import reason_field
from service.web.schemas.rules import key_field
from service.web.schemas.views import JobSchema


class ForgetRequestSchema(Schema):
    """The keys to forget and why."""

    class Meta:
        unknown = RAISE

    keys = fields.List(key_field(), required=True, validate=validate.Length(min=1), metadata={
        "description": f"The keys of the records and scored cases to forget: 1 to "
                       f"{MAX_FORGET_KEYS:,} (more: 413). Repeats count once.",
        "maxItems": MAX_FORGET_KEYS})
    reason = reason_field()

    @pre_load
    def _bounded(self, data: Any, **kwargs: Any) -> Any:
        # Counted before any key is looked at: 10 million keys cost seconds
        # of validation only to be refused.
        keys = data.get("keys") if isinstance(data, dict) else None
        if isinstance(keys, list) and len(keys) > MAX_FORGET_KEYS:
            raise TooLargeError(f"At most {MAX_FORGET_KEYS} keys per request; got "
                                f"{len(keys)}. Nothing was forgotten; send them in parts.")
        return data


class ForgetQuerySchema(Schema):
    class Meta:
        unknown = RAISE

    retrain = BooleanFromText(load_default=False, metadata={
        "description": "Also queue a retrain from scratch, which reads the train records "
                       "that are left (only when something was forgotten)."})


class RemovedSchema(Schema):
    records = fields.Integer(required=True)
    train = fields.Integer(required=True)
    holdout = fields.Integer(required=True)
    cases = fields.Integer(required=True, metadata={"description": "Scored cases removed."})
    outcomes = fields.Integer(required=True, metadata={
        "description": "Of those cases, the ones that had an outcome."})
    track_record_outcomes = fields.Integer(required=True, metadata={
        "description": "Outcomes taken out of the live metrics' day sums."})


class MarkedVersionSchema(Schema):
    number = fields.Integer(required=True)
    status = fields.String(required=True)
    records = fields.Integer(required=True, metadata={
        "description": "How many of these records it was trained on."})


class ActiveVersionSchema(Schema):
    version = fields.Integer(required=True)
    records = fields.Integer(required=True, metadata={
        "description": "How many of these records it was trained on; it keeps serving "
                       "until another version is promoted."})


class ForgetAnswerSchema(Schema):
    """What was forgotten and what it means for the versions."""

    model = fields.String(required=True)
    keys = fields.Integer(required=True, metadata={"description": "Distinct keys asked for."})
    forgotten = fields.Integer(required=True, metadata={
        "description": "Keys with a record or a scored case that was removed."})
    absent = fields.Integer(required=True, metadata={
        "description": "Keys found nowhere: never stored, or forgotten before. Not an error."})
    absent_keys = fields.List(fields.String(), required=True, metadata={
        "description": f"The first {SHOWN} absent keys."})
    removed = fields.Nested(RemovedSchema, required=True)
    versions_marked = fields.List(fields.Nested(MarkedVersionSchema), required=True, metadata={
        "description": f"The first {SHOWN} versions trained on any of these records "
                       "(each now shows it in `forgotten_records`)."})
    versions_marked_count = fields.Integer(required=True)
    active = fields.Nested(ActiveVersionSchema, required=True, allow_none=True)
    message = fields.String(required=True, metadata={
        "description": "What this means for serving, in plain words."})
    event = fields.Integer(required=True, allow_none=True, metadata={
        "description": "The history event of this act (null: nothing changed)."})
    retrain = fields.Nested(JobSchema, required=True, allow_none=True)
