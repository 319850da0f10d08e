"""Schemas of a model's history and of the admin acts it records: the
optional ``reason`` every admin act on a model takes, the history's page
query and its answer, and the pause state."""

from __future__ import annotations

from marshmallow import RAISE, Schema, fields, validate

from service.store.model_events import KINDS
from service.web.schemas.fields import IntegerFromText
from service.web.schemas.paging import MAX_PAGE_SIZE, NEXT, PAGE_SIZE

MAX_REASON_CHARACTERS = 1000


def reason_field() -> fields.String:
    """Why an admin acted, kept in the model's history as sent."""
    return fields.String(validate=validate.Length(max=MAX_REASON_CHARACTERS), metadata={
        "description": "Why (kept in the model's history; at most "
                       f"{MAX_REASON_CHARACTERS} characters)."})


class ActRequestSchema(Schema):
    """The body of an admin act that takes nothing but its reason (optional)."""

    class Meta:
        unknown = RAISE

    reason = reason_field()


class HistoryPageSchema(Schema):
    """GET /v1/models/{name}/history query: events oldest first."""

    class Meta:
        unknown = RAISE

    limit = IntegerFromText(minimum=1, maximum=MAX_PAGE_SIZE, load_default=PAGE_SIZE,
                            metadata={"description": f"Items per page (default {PAGE_SIZE})."})
    after = IntegerFromText(minimum=0, maximum=2**63 - 1, metadata={
        "description": "The `next` of the page before: events after it."})


class ModelEventSchema(Schema):
    id = fields.Integer(required=True)
    kind = fields.String(required=True, validate=validate.OneOf(KINDS))
    at = fields.DateTime(required=True)
    token = fields.String(required=True, allow_none=True, metadata={
        "description": "The name of the token that acted; null for the worker's own acts "
                       "(an automatic promotion)."})
    reason = fields.String(required=True, allow_none=True)
    at_seq = fields.Integer(required=True, metadata={
        "description": "The model's last record sequence at that moment: a settings "
                       "change applies to the records after it."})
    details = fields.Dict(required=True)


class HistorySchema(Schema):
    """A page of a model's history, oldest first."""

    events = fields.List(fields.Nested(ModelEventSchema), required=True)
    next = fields.Integer(required=True, allow_none=True, metadata=NEXT)


class PauseStateSchema(Schema):
    paused = fields.Boolean(required=True)
    paused_at = fields.DateTime(required=True, allow_none=True)
