"""POST /v1/models/{name}/sweeps: the request and the answer."""

from __future__ import annotations

from marshmallow import Schema, fields, validate

from service.usecases.sweeps import DEFAULT_POINTS, MAX_POINTS, MIN_POINTS
from service.web.schemas.fields import StrictInteger
from service.web.schemas.rules import RecordRules

MAX_FIELDS = 256


class SweepRequestSchema(Schema):
    """A record, and which of its numeric fields to sweep over how many points."""

    features = RecordRules.any_model().features_field()
    fields_ = fields.List(fields.String(validate=validate.Length(min=1, max=64)),
                          data_key="fields",
                          validate=validate.Length(min=1, max=MAX_FIELDS), metadata={
                              "description": "Numeric fields to sweep; default every one."})
    points = StrictInteger(minimum=MIN_POINTS, maximum=MAX_POINTS, metadata={
        "description": f"Points per field, evenly spaced across its range; default "
                       f"{DEFAULT_POINTS}."})
    output = fields.Raw(metadata={
        "description": "Classification: the class whose probability is swept; default the "
                       "class the record as given is predicted to be."})
    version = StrictInteger(minimum=1, maximum=2**31 - 1, metadata={
        "description": "A version number; default the active version."})


class SweepSchema(Schema):
    field = fields.String(required=True)
    x = fields.List(fields.Float(), required=True,
                    metadata={"description": "The field's values, ascending."})
    y = fields.List(fields.Float(), required=True, metadata={
        "description": "The output at each x: the probability of `output`, or the value."})
    current = fields.Float(required=True, metadata={"description": "The record's own value."})


class SweepAnswerSchema(Schema):
    model = fields.String(required=True)
    version = fields.Integer(required=True)
    output = fields.String(required=True, allow_none=True, metadata={
        "description": "The class swept (spelled as a JSON key); null for regression."})
    sweeps = fields.List(fields.Nested(SweepSchema), required=True)
