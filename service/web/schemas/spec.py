"""The model spec a client POSTs (docs/http-api.md, "Models"), validated strictly.

Every rule the contract states is here; the engine's ``apply_defaults`` then
fills the defaults (and re-checks what shapes the network). Unknown keys are
rejected at every level so a typo never silently becomes a default.
"""

from __future__ import annotations

from collections import Counter
from typing import Any

from marshmallow import (
    RAISE,
    Schema,
    ValidationError,
    fields,
    post_load,
    validate,
    validates_schema,
)

from service.usecases.common import MODEL_NAME_PATTERN
from service.web.schemas.fields import StrictBoolean, StrictInteger, StrictNumber

# Feature and target names become JSON keys, CSV headers, query parameters and
# parts of error paths (``records.3.features.x``): no dots, no spaces.
FIELD_NAME_PATTERN = r"[A-Za-z_][A-Za-z0-9_]{0,63}"
# Query parameters of GET predictions and the CSV key column: a feature may
# not take these names or it could not be sent.
RESERVED_FIELD_NAMES = frozenset(
    {"key", "explain", "version", "output", "steps", "samples", "noise", "seed", "baseline"}
)
TASKS = ("binary", "multiclass", "regression")
FEATURE_TYPES = ("numeric", "categorical", "boolean")
ACTIVATIONS = ("tanh", "logistic", "relu")
MAX_FEATURES = 1000
MAX_LEVELS = 1000
MAX_CLASSES = 1000
MAX_LAYERS = 8
MAX_WIDTH = 4096


def _field_name(**kwargs: Any) -> fields.String:
    return fields.String(
        validate=[
            validate.Regexp(f"^{FIELD_NAME_PATTERN}$", error="Use letters, digits and _ "
                            "(not starting with a digit), at most 64 characters."),
            validate.NoneOf(sorted(RESERVED_FIELD_NAMES), error="This name is reserved."),
        ],
        **kwargs,
    )


class FeatureSchema(Schema):
    class Meta:
        unknown = RAISE

    name = _field_name(required=True)
    type = fields.String(required=True, validate=validate.OneOf(FEATURE_TYPES))
    min = StrictNumber()
    max = StrictNumber()
    unit = fields.String(validate=validate.Length(max=32))
    levels = fields.List(
        fields.String(validate=validate.Length(min=1, max=200)),
        validate=validate.Length(min=1, max=MAX_LEVELS),
    )

    @validates_schema
    def _fits_type(self, data: dict[str, Any], **kwargs: Any) -> None:
        kind = data.get("type")
        errors: dict[str, list[str]] = {}
        if kind == "categorical":
            levels = data.get("levels")
            if levels is None:
                errors["levels"] = ["A categorical feature lists its levels."]
            elif len(set(levels)) != len(levels):
                errors["levels"] = ["Levels must be distinct."]
        elif "levels" in data:
            errors["levels"] = ["Only a categorical feature has levels."]
        if kind != "numeric":
            for key in ("min", "max", "unit"):
                if key in data:
                    errors[key] = ["Only a numeric feature has this."]
        elif "min" in data and "max" in data and not data["min"] < data["max"]:
            errors["max"] = ["Must be above min."]
        if errors:
            raise ValidationError(errors)


class TrainingSchema(Schema):
    class Meta:
        unknown = RAISE

    optimizer = fields.String(validate=validate.OneOf(("sgd", "adam")))
    learning_rate = StrictNumber(minimum=0, exclusive_minimum=True, maximum=10)
    momentum = StrictNumber(minimum=0, maximum=0.999999)
    nesterov = StrictBoolean()
    l2 = StrictNumber(minimum=0, maximum=10)
    clip_norm = StrictNumber(minimum=0, exclusive_minimum=True, allow_none=True)
    lr_schedule = fields.String(validate=validate.OneOf(("constant", "invscaling")))
    power_t = StrictNumber(minimum=0, maximum=10)
    batch_size = StrictInteger(minimum=1, maximum=65_536)
    max_epochs = StrictInteger(minimum=1, maximum=100_000)
    patience = StrictInteger(minimum=1, maximum=100_000)
    validation_fraction = StrictNumber(minimum=0, maximum=0.9)
    seed = StrictInteger(minimum=0, maximum=2**32 - 1)
    warmup_records = StrictInteger(minimum=0, maximum=10_000_000)
    holdout_fraction = StrictNumber(minimum=0, maximum=0.9)
    checkpoint_every = StrictInteger(minimum=1, maximum=100_000_000)


class ClassLabel(fields.Field[Any]):
    """A class: a string, an integer or a boolean."""

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if isinstance(value, str) and 1 <= len(value) <= 200 or isinstance(value, bool | int):
            return value
        raise ValidationError("A class is a string (1 to 200 characters), integer or boolean.")


class ModelSpecSchema(Schema):
    """POST /v1/models body."""

    class Meta:
        unknown = RAISE

    name = fields.String(
        required=True,
        validate=validate.Regexp(
            f"^{MODEL_NAME_PATTERN}$",
            error="Use lowercase letters, digits and -, starting with a letter or digit, "
            "at most 64 characters.",
        ),
    )
    task = fields.String(required=True, validate=validate.OneOf(TASKS))
    target = _field_name(required=True)
    classes = fields.List(
        ClassLabel(), allow_none=True, validate=validate.Length(min=2, max=MAX_CLASSES)
    )
    features = fields.List(
        fields.Nested(FeatureSchema),
        required=True,
        validate=validate.Length(min=1, max=MAX_FEATURES),
    )
    hidden_layers = fields.List(
        StrictInteger(minimum=1, maximum=MAX_WIDTH), validate=validate.Length(max=MAX_LAYERS)
    )
    activation = fields.String(validate=validate.OneOf(ACTIVATIONS))
    loss = fields.String(validate=validate.OneOf(("cross_entropy", "squared_error")))
    training = fields.Nested(TrainingSchema)
    promotion = fields.String(validate=validate.OneOf(("auto", "manual")))

    @validates_schema
    def _consistent(self, data: dict[str, Any], **kwargs: Any) -> None:
        errors: dict[str, list[str]] = {}
        task = data.get("task")
        classes = data.get("classes")
        if task == "multiclass" and classes is None:
            errors["classes"] = ["A multiclass model lists its classes."]
        elif task == "binary" and classes is not None and len(classes) != 2:
            errors["classes"] = ["A binary model has exactly two classes."]
        elif task == "regression" and classes is not None:
            errors["classes"] = ["A regression model has no classes."]
        if classes is not None:
            kinds = {type(c) for c in classes}
            if len(kinds) > 1:
                errors.setdefault("classes", []).append("Classes must all be of one type.")
            elif len(set(classes)) != len(classes):
                errors.setdefault("classes", []).append("Classes must be distinct.")
        if "loss" in data and task != "binary" and data["loss"] != (
            "squared_error" if task == "regression" else "cross_entropy"
        ):
            errors["loss"] = ["Only a binary model chooses its loss."]
        names = [f.get("name") for f in data.get("features", [])]
        duplicates = sorted(n for n, count in Counter(names).items() if count > 1)
        if duplicates:
            errors["features"] = [f"Feature {n!r} is declared twice." for n in duplicates]
        if data.get("target") in names:
            errors["target"] = ["The target cannot also be a feature."]
        if errors:
            raise ValidationError(errors)

    @post_load
    def _drop_null_classes(self, data: dict[str, Any], **kwargs: Any) -> dict[str, Any]:
        # ``"classes": null`` means "not given": the defaults then apply.
        if data.get("classes", ()) is None:
            del data["classes"]
        return data
