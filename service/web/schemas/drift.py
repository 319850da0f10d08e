"""GET /v1/models/{name}/drift: its query and its answer (docs/http-api.md, "Drift")."""

from __future__ import annotations

from marshmallow import RAISE, Schema, fields

from service.usecases.drift import DEFAULT_WINDOW_DAYS, MAX_WINDOW_DAYS
from service.web.schemas.fields import IntegerFromText

STATUS = {"enum": ["steady", "shifting", "shifted"],
          "description": "From PSI: below 0.1 steady, below 0.25 shifting, else shifted; "
                         "null when either side counted nothing."}


class DriftQuerySchema(Schema):
    class Meta:
        unknown = RAISE

    window_days = IntegerFromText(
        minimum=1, maximum=MAX_WINDOW_DAYS, load_default=DEFAULT_WINDOW_DAYS,
        metadata={"description": f"Days of predictions compared (default {DEFAULT_WINDOW_DAYS}; "
                                 "whole hours, from the top of the hour the window starts in)."})


class KsSchema(Schema):
    statistic = fields.Float(required=True, metadata={
        "description": "Largest distance of the two distribution functions at the "
                       "reference's percentiles (a lower bound of the samples' statistic)."})
    statistic_bound = fields.Float(required=True, metadata={
        "description": "An upper bound of the samples' statistic."})
    p_value = fields.Float(required=True)


class ChiSquareSchema(Schema):
    statistic = fields.Float(required=True)
    dof = fields.Integer(required=True)
    p_value = fields.Float(required=True)


class FieldDriftSchema(Schema):
    name = fields.String(required=True)
    type = fields.String(required=True, metadata={"enum": ["numeric", "categorical", "boolean"]})
    psi = fields.Float(required=True, allow_none=True)
    status = fields.String(required=True, allow_none=True, metadata=STATUS)
    ks = fields.Nested(KsSchema, required=True, allow_none=True)
    chi_square = fields.Nested(ChiSquareSchema, required=True, allow_none=True)
    bins = fields.List(fields.String(), required=True, metadata={
        "description": "PSI's bins: a numeric field's deciles by lower edge (the first "
                       "\"-inf\"), a categorical field's levels and \"other\", false and true."})
    reference_counts = fields.List(fields.Integer(), required=True)
    recent_counts = fields.List(fields.Integer(), required=True)


class DriftWindowSchema(Schema):
    days = fields.Integer(required=True)
    since = fields.DateTime(required=True)
    until = fields.DateTime(required=True)


class DriftSchema(Schema):
    model = fields.String(required=True)
    version = fields.Integer(required=True)
    window = fields.Nested(DriftWindowSchema, required=True)
    reference_records = fields.Integer(required=True)
    recent_predictions = fields.Integer(required=True)
    status = fields.String(required=True, allow_none=True, metadata={
        **STATUS, "description": "The worst field's status."})
    fields_ = fields.List(fields.Nested(FieldDriftSchema), required=True, data_key="fields")
