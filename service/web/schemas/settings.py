"""PATCH /v1/models/{name} body: the settings a model may change in place.

The same field rules as the spec it patches (TrainingSchema, AlarmSchema and
the promotion choice of service/web/schemas/spec.py, so a value valid at
creation is valid here and the reverse); what shapes the network or the
fields is refused with the reason, since a stored record, version and
snapshot are only meaningful under the fields and network they were made for.
"""

from __future__ import annotations

from typing import Any

from marshmallow import RAISE, Schema, ValidationError, fields, pre_load

import engine
from service.web.schemas.history import reason_field
from service.web.schemas.spec import AlarmSchema, ModelSpecSchema, TrainingSchema

# Spec keys that define the network or the fields: changing any is a new model.
NEEDS_A_NEW_MODEL = ("name", "task", "target", "classes", "features", "hidden_layers",
                     "activation", "loss")
# Training options the live state depends on: the optimizer's kind decides
# what its state is, which cannot carry over to another kind.
FIXED_TRAINING = ("optimizer",)
NEW_MODEL_MESSAGE = ("Changes the network or the fields; this needs a new model "
                     "(create one, and send it the records).")


class TrainingChangeSchema(TrainingSchema):
    """The training options a patch may change: all but FIXED_TRAINING. A
    class of its own, so the published document names it (a nested schema
    with ``exclude`` would be a second schema called Training)."""

    class Meta:
        exclude = FIXED_TRAINING


class ModelPatchSchema(Schema):
    """The settings to change, each optional; training and alarm are merged
    into the stored ones key by key."""

    class Meta:
        unknown = RAISE

    promotion = ModelSpecSchema._declared_fields["promotion"]
    training = fields.Nested(TrainingChangeSchema)
    alarm = fields.Nested(AlarmSchema)
    reason = reason_field()

    @pre_load
    def _refuse_a_new_model(self, data: Any, **kwargs: Any) -> Any:
        if not isinstance(data, dict):
            return data
        errors: dict[str, Any] = {key: [NEW_MODEL_MESSAGE] for key in NEEDS_A_NEW_MODEL
                                  if key in data}
        training = data.get("training")
        if isinstance(training, dict):
            fixed = {key: ["Cannot change while the model keeps its optimizer state; "
                           "this needs a new model."] for key in FIXED_TRAINING
                     if key in training}
            if fixed:
                errors["training"] = fixed
        if errors:
            raise ValidationError(errors)
        return data


# The keys a patch may hold besides its reason (the documented list).
PATCHABLE = ("promotion", "training", "alarm")
assert set(PATCHABLE) | {"reason"} == set(ModelPatchSchema._declared_fields)
assert all(key in engine.TRAINING_DEFAULTS for key in FIXED_TRAINING)
