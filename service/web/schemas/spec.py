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

import engine
from service.usecases.common import MODEL_NAME_PATTERN
from service.usecases.predictions import QUERY_NAMES
from service.web.schemas.fields import StrictBoolean, StrictInteger, StrictNumber, WholeMatch

# Feature and target names become JSON keys, CSV headers, query parameters and
# parts of error paths (``records.3.features.x``): no dots, no spaces.
FIELD_NAME_PATTERN = r"[A-Za-z_][A-Za-z0-9_]{0,63}"
# Query parameters of GET predictions and the CSV key column (and "baseline",
# reserved with them from the start): a feature may not take these names or it
# could not be sent.
RESERVED_FIELD_NAMES = frozenset({"baseline", *QUERY_NAMES})
# The longest level or class (a string): what a record's value may then be.
MAX_VALUE_LENGTH = 200
# How many features, levels and classes a spec may list are settings
# (KEELSON_MAX_FEATURES, _LEVELS, _CLASSES; checked with the network's size in
# service.usecases.model_limits, stated in each app's OpenAPI document).
MAX_LAYERS = 8
MAX_WIDTH = 4096


def _field_name(**kwargs: Any) -> fields.String:
    reserved = sorted(RESERVED_FIELD_NAMES)
    return fields.String(
        validate=[
            WholeMatch(FIELD_NAME_PATTERN, error="Use letters, digits and _ "
                            "(not starting with a digit), at most 64 characters."),
            validate.NoneOf(reserved, error="This name is reserved."),
        ],
        metadata={"not": {"enum": reserved}},
        **kwargs,
    )


def _only(kind: str, *, requires: tuple[str, ...] = (), refuses: tuple[str, ...] = ()
          ) -> dict[str, Any]:
    """JSON Schema: a feature of type ``kind`` has ``requires`` and none of ``refuses``."""
    variant: dict[str, Any] = {"properties": {"type": {"enum": [kind]}}}
    if requires:
        variant["required"] = list(requires)
    if refuses:
        variant["not"] = {"anyOf": [{"required": [key]} for key in refuses]}
    return variant


class FeatureSchema(Schema):
    class Meta:
        unknown = RAISE

    # What ``_fits_type`` checks, as the document states it (min < max it cannot state).
    DOCUMENTED_RULES = {
        "description": "A declared feature. A numeric one may give min < max and a unit; a "
        "categorical one lists its distinct levels.",
        "oneOf": [
            _only("numeric", refuses=("levels",)),
            _only("categorical", requires=("levels",), refuses=("min", "max", "unit")),
            _only("boolean", refuses=("levels", "min", "max", "unit")),
        ],
    }

    name = _field_name(required=True)
    type = fields.String(required=True, validate=validate.OneOf(engine.FEATURE_TYPES))
    min = StrictNumber()
    max = StrictNumber()
    unit = fields.String(validate=validate.Length(max=32))
    levels = fields.List(
        fields.String(validate=validate.Length(min=1, max=MAX_VALUE_LENGTH)),
        validate=validate.Length(min=1), metadata={"uniqueItems": True},
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

    optimizer = fields.String(validate=validate.OneOf(engine.OPTIMIZERS))
    learning_rate = StrictNumber(minimum=0, exclusive_minimum=True, maximum=10)
    momentum = StrictNumber(minimum=0, maximum=0.999999)
    nesterov = StrictBoolean()
    l2 = StrictNumber(minimum=0, maximum=10)
    clip_norm = StrictNumber(minimum=0, exclusive_minimum=True, allow_none=True)
    lr_schedule = fields.String(validate=validate.OneOf(engine.LR_SCHEDULES), metadata={
        "description": "`inverse_power`: the rate at step t = 1, 2, ... is "
        "learning_rate / t ** decay_exponent."})
    decay_exponent = StrictNumber(minimum=0, maximum=10)
    batch_size = StrictInteger(minimum=1, maximum=65_536)
    max_epochs = StrictInteger(minimum=1, maximum=100_000)
    patience = StrictInteger(minimum=1, maximum=100_000)
    validation_fraction = StrictNumber(minimum=0, maximum=0.9)
    seed = StrictInteger(minimum=0, maximum=2**32 - 1)
    warmup_records = StrictInteger(minimum=0, maximum=10_000_000)
    holdout_fraction = StrictNumber(minimum=0, maximum=0.9)
    checkpoint_every = StrictInteger(minimum=1, maximum=100_000_000)

    def handle_error(self, error: ValidationError, data: Any, **kwargs: Any) -> None:
        """Name the new spelling when a request uses an option's old one."""
        messages = error.messages
        if not isinstance(data, dict) or not isinstance(messages, dict):
            raise error
        renamed = dict(messages)
        for old, new in engine.LEGACY_TRAINING_KEYS.items():
            if old in data and old in renamed:
                renamed[old] = [f"Spelled {new} now."]
        schedule = data.get("lr_schedule")
        if isinstance(schedule, str) and schedule in engine.LEGACY_LR_SCHEDULES:
            renamed["lr_schedule"] = [
                f"Spelled {engine.LEGACY_LR_SCHEDULES[schedule]!r} now."]
        raise ValidationError(renamed, data=error.data, valid_data=error.valid_data)


class AlarmSchema(Schema):
    """The change alarm's parameters (engine.track_record, Page-Hinkley); the
    defaults per task are engine.spec.ALARM_DEFAULTS."""

    class Meta:
        unknown = RAISE

    delta = StrictNumber(minimum=0, maximum=1000, metadata={
        "description": "The rise of the per-case loss tolerated per case."})
    threshold = StrictNumber(minimum=0, exclusive_minimum=True, maximum=1_000_000, metadata={
        "description": "How far the test statistic may climb before the alarm is raised."})


# A class is a string, an integer or a boolean; all classes of a model are of
# one of these types. As JSON Schema: the ``items`` of one of these arrays.
CLASS_TYPES: list[dict[str, Any]] = [
    {"type": "string", "minLength": 1, "maxLength": MAX_VALUE_LENGTH},
    {"type": "integer"},
    {"type": "boolean"},
]


class ClassLabel(fields.Field[Any]):
    """A class: a string, an integer (``2.0`` is the integer 2: JSON has one
    number type) or a boolean."""

    def __init__(self, **kwargs: Any) -> None:
        super().__init__(**kwargs)
        self.metadata = {"oneOf": CLASS_TYPES, **self.metadata}

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if isinstance(value, float) and value.is_integer():
            return int(value)
        if (isinstance(value, str) and 1 <= len(value) <= MAX_VALUE_LENGTH
                or isinstance(value, bool | int)):
            return value
        raise ValidationError(
            f"A class is a string (1 to {MAX_VALUE_LENGTH} characters), integer or boolean.")


def _task(task: str, **properties: Any) -> dict[str, Any]:
    """JSON Schema: what a spec of ``task`` may say of ``properties``."""
    variant: dict[str, Any] = {"properties": {"task": {"enum": [task]}, **properties}}
    if task == "multiclass":
        variant["required"] = ["classes"]
    return variant


class ModelSpecSchema(Schema):
    """POST /v1/models body."""

    class Meta:
        unknown = RAISE

    # What ``_consistent`` checks, as the document states it; feature names that
    # differ and a target that is not one of them it can only say in words.
    DOCUMENTED_RULES = {
        "description": "A model spec. Feature names are distinct and the target is none "
        "of them. Classes: a binary model has two (default [false, true]), a multiclass "
        "model lists them, a regression model has none; only a binary model chooses its "
        "loss. The network's parameters are bounded (KEELSON_MAX_PARAMETERS), and so is "
        "what its versions write per record: checkpoint_every is at least the snapshot's "
        "size over KEELSON_MAX_VERSION_BYTES_PER_RECORD (422 beyond either, stating the "
        "limit).",
        "oneOf": [
            _task("binary", classes={"maxItems": 2}),
            _task("multiclass", classes={"type": "array"},
                  loss={"enum": list(engine.LOSSES["multiclass"])}),
            _task("regression", classes={"type": ["array", "null"], "maxItems": 0},
                  loss={"enum": list(engine.LOSSES["regression"])}),
        ],
    }

    name = fields.String(
        required=True,
        validate=WholeMatch(
            MODEL_NAME_PATTERN,
            error="Use lowercase letters, digits and -, starting with a letter or digit, "
            "at most 64 characters.",
        ),
    )
    task = fields.String(required=True, validate=validate.OneOf(engine.TASKS))
    target = _field_name(required=True)
    classes = fields.List(
        ClassLabel(), allow_none=True, validate=validate.Length(min=2),
        metadata={"uniqueItems": True, "anyOf": [{"items": kind} for kind in CLASS_TYPES]},
    )
    features = fields.List(
        fields.Nested(FeatureSchema),
        required=True,
        validate=validate.Length(min=1),
    )
    hidden_layers = fields.List(
        StrictInteger(minimum=1, maximum=MAX_WIDTH), validate=validate.Length(max=MAX_LAYERS)
    )
    activation = fields.String(validate=validate.OneOf(engine.ACTIVATIONS))
    loss = fields.String(validate=validate.OneOf(engine.LOSSES["binary"]))
    training = fields.Nested(TrainingSchema)
    promotion = fields.String(validate=validate.OneOf(engine.PROMOTIONS))
    alarm = fields.Nested(AlarmSchema)

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
        if "loss" in data and task in engine.LOSSES and data["loss"] not in engine.LOSSES[task]:
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
