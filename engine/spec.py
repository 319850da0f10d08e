"""The model spec: its vocabularies, the one table of defaults, validation, and
the shape hash.

The engine reads the spec as the plain mapping the API stores. `apply_defaults`
returns a full, validated copy; every later reader may then index it directly.
The vocabularies below are the only definition of each word a spec may use;
the service imports them rather than repeating them.
"""

from __future__ import annotations

import copy
import hashlib
import json
import math
from collections.abc import Mapping
from typing import Any

from engine.errors import InvalidInputError

TASKS = ("binary", "multiclass", "regression")
FEATURE_TYPES = ("numeric", "categorical", "boolean")
ACTIVATIONS = ("tanh", "logistic", "relu")
OPTIMIZERS = ("sgd", "adam")
# `inverse_power`: the rate at step t = 1, 2, ... is learning_rate / t ** decay_exponent.
LR_SCHEDULES = ("constant", "inverse_power")
PROMOTIONS = ("auto", "manual")
# Loss per task: binary may choose; the other tasks have exactly one.
LOSSES = {
    "binary": ("cross_entropy", "squared_error"),
    "multiclass": ("cross_entropy",),
    "regression": ("squared_error",),
}

DEFAULT_HIDDEN_LAYERS = (32, 16)
TRAINING_DEFAULTS: dict[str, Any] = {
    "optimizer": "sgd",
    "learning_rate": 0.01,
    "momentum": 0.9,
    "nesterov": False,
    "l2": 0.0001,
    "clip_norm": 5.0,
    "lr_schedule": "constant",
    "decay_exponent": 0.5,
    "batch_size": 64,
    "max_epochs": 200,
    "patience": 10,
    "validation_fraction": 0.1,
    "seed": 0,
    "warmup_records": 256,
    "holdout_fraction": 0.2,
    "checkpoint_every": 1000,
}

# The change alarm (engine.track_record, Page-Hinkley) per task: `delta`, the
# drift of the loss tolerated per case, and `threshold`, how far the statistic
# may climb before the alarm is raised; both in units of the alarm's per-case
# loss: the Brier term for classification, the relative absolute error for
# regression. Chosen by simulation: calm on 10,000 stationary cases, raised
# within about 150 cases of a step (tests/engine/test_track_record.py).
ALARM_DEFAULTS: dict[str, dict[str, float]] = {
    "binary": {"delta": 0.01, "threshold": 20.0},
    "multiclass": {"delta": 0.01, "threshold": 20.0},
    "regression": {"delta": 0.1, "threshold": 50.0},
}


# Training options spelled differently before: old key -> new key, and old
# schedule name -> new one. Only `upgrade_legacy_spec` reads these.
LEGACY_TRAINING_KEYS = {"power_t": "decay_exponent"}
LEGACY_LR_SCHEDULES = {"invscaling": "inverse_power"}


def upgrade_legacy_spec(spec: Mapping[str, Any]) -> dict[str, Any]:
    """A copy of a stored spec with the training options' old spelling translated.

    Specs written before the rename (in snapshots, and in the store until its
    migration ran) say `power_t` and `lr_schedule: "invscaling"`; this spells
    them `decay_exponent` and `"inverse_power"`, the same settings. A spec
    already spelled the new way comes back equal. `apply_defaults` refuses the
    old spelling, so a reader of stored specs calls this first.
    """
    if not isinstance(spec, Mapping):
        raise InvalidInputError("the model spec must be a mapping", field=None)
    upgraded: dict[str, Any] = copy.deepcopy(dict(spec))
    training = upgraded.get("training")
    if not isinstance(training, dict):
        return upgraded
    for old, new in LEGACY_TRAINING_KEYS.items():
        if old in training:
            value = training.pop(old)
            training.setdefault(new, value)
    schedule = training.get("lr_schedule")
    if isinstance(schedule, str) and schedule in LEGACY_LR_SCHEDULES:
        training["lr_schedule"] = LEGACY_LR_SCHEDULES[schedule]
    return upgraded


def apply_defaults(spec: Mapping[str, Any]) -> dict[str, Any]:
    """Return a validated deep copy of `spec` with every default filled in.

    Raises InvalidInputError(field=...) naming the first offending key. The
    training options' old spelling is refused here (a silently ignored
    `power_t` would train with another rate); stored specs go through
    `upgrade_legacy_spec` first.
    """
    if not isinstance(spec, Mapping):
        raise InvalidInputError("the model spec must be a mapping", field=None)
    full: dict[str, Any] = copy.deepcopy(dict(spec))
    task = full.get("task")
    if task not in TASKS:
        raise InvalidInputError(f"task must be one of {', '.join(TASKS)}", field="task")
    if task == "binary":
        full.setdefault("classes", [False, True])
    if task != "regression":
        _check_classes(full.get("classes"), task)
    else:
        full["classes"] = None
    full["features"] = _check_features(full.get("features"))
    hidden = full.setdefault("hidden_layers", list(DEFAULT_HIDDEN_LAYERS))
    if not isinstance(hidden, list) or not all(_is_int(h) and h >= 1 for h in hidden):
        raise InvalidInputError(
            "hidden_layers must be a list of positive integers", field="hidden_layers"
        )
    full.setdefault("activation", "tanh")
    _check_choice(full, "activation", ACTIVATIONS)
    full.setdefault("loss", LOSSES[task][0])
    _check_choice(full, "loss", LOSSES[task])
    full.setdefault("promotion", "auto")
    _check_choice(full, "promotion", PROMOTIONS)
    training = full.setdefault("training", {})
    if not isinstance(training, dict):
        raise InvalidInputError("training must be a mapping", field="training")
    for key, value in TRAINING_DEFAULTS.items():
        training.setdefault(key, value)
    _check_training(training)
    alarm = full.setdefault("alarm", {})
    if not isinstance(alarm, dict):
        raise InvalidInputError("alarm must be a mapping", field="alarm")
    for key, value in ALARM_DEFAULTS[task].items():
        alarm.setdefault(key, value)
    _check_alarm(alarm)
    return full


def spec_hash(spec: Mapping[str, Any]) -> str:
    """SHA-256 (hex) of the parts of the spec that shape the network and the encoding.

    Two specs with the same hash accept the same snapshots; training settings and
    names do not enter it.
    """
    full = apply_defaults(spec)
    shape = {
        "task": full["task"],
        "classes": full["classes"],
        "features": [
            {k: f.get(k) for k in ("name", "type", "min", "max", "levels")}
            for f in full["features"]
        ],
        "hidden_layers": full["hidden_layers"],
        "activation": full["activation"],
        "loss": full["loss"],
    }
    text = json.dumps(shape, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _is_int(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _is_number(value: object) -> bool:
    return (
        isinstance(value, int | float)
        and not isinstance(value, bool)
        and math.isfinite(value)
    )


def _check_choice(mapping: Mapping[str, Any], key: str, choices: tuple[str, ...],
                  prefix: str = "") -> None:
    if mapping.get(key) not in choices:
        raise InvalidInputError(
            f"{prefix}{key} must be one of {', '.join(choices)}", field=prefix + key
        )


def _check_classes(classes: object, task: str) -> None:
    if not isinstance(classes, list) or len(classes) < 2:
        raise InvalidInputError("classes must list at least two labels", field="classes")
    if task == "binary" and len(classes) != 2:
        raise InvalidInputError("a binary task has exactly two classes", field="classes")
    if not all(isinstance(c, str | int | bool) for c in classes):
        raise InvalidInputError("class labels must be strings, integers or booleans",
                                field="classes")
    # Python equates True with 1, JSON does not: labels must differ in both worlds.
    if len(set(classes)) != len(classes) or len({json.dumps(c) for c in classes}) != len(classes):
        raise InvalidInputError("class labels must be distinct", field="classes")


def _check_features(features: object) -> list[dict[str, Any]]:
    if not isinstance(features, list) or not features:
        raise InvalidInputError("features must be a non-empty list", field="features")
    seen: set[str] = set()
    for i, feature in enumerate(features):
        where = f"features.{i}"
        if not isinstance(feature, dict):
            raise InvalidInputError("a feature must be a mapping", field=where)
        name = feature.get("name")
        if not isinstance(name, str) or not name:
            raise InvalidInputError("a feature needs a non-empty name", field=where + ".name")
        if name in seen:
            raise InvalidInputError(f"feature {name!r} is declared twice", field=where + ".name")
        seen.add(name)
        _check_choice(feature, "type", FEATURE_TYPES, prefix=where + ".")
        for bound in ("min", "max"):
            if feature.get(bound) is not None and not _is_number(feature[bound]):
                raise InvalidInputError(f"{bound} must be a finite number",
                                        field=f"{where}.{bound}")
        low, high = feature.get("min"), feature.get("max")
        if low is not None and high is not None and not low < high:
            raise InvalidInputError("min must be below max", field=where + ".max")
        if feature["type"] == "categorical":
            levels = feature.get("levels")
            if (not isinstance(levels, list) or not levels
                    or not all(isinstance(v, str) for v in levels)
                    or len(set(levels)) != len(levels)):
                raise InvalidInputError("levels must be a non-empty list of distinct strings",
                                        field=where + ".levels")
    return features


def _check_alarm(alarm: dict[str, Any]) -> None:
    unknown = sorted(set(alarm) - {"delta", "threshold"})
    if unknown:
        raise InvalidInputError(f"alarm has no option {unknown[0]!r}", field=f"alarm.{unknown[0]}")
    if not (_is_number(alarm["delta"]) and alarm["delta"] >= 0):
        raise InvalidInputError("alarm.delta must be a finite number >= 0", field="alarm.delta")
    if not (_is_number(alarm["threshold"]) and alarm["threshold"] > 0):
        raise InvalidInputError("alarm.threshold must be a finite number > 0",
                                field="alarm.threshold")


def _check_training(training: dict[str, Any]) -> None:
    def fail(key: str, message: str) -> InvalidInputError:
        return InvalidInputError(f"training.{key} {message}", field=f"training.{key}")

    for old, new in LEGACY_TRAINING_KEYS.items():
        if old in training:
            raise fail(old, f"is spelled {new} now")
    _check_choice(training, "optimizer", OPTIMIZERS, prefix="training.")
    _check_choice(training, "lr_schedule", LR_SCHEDULES, prefix="training.")
    positive = ("learning_rate",)
    for key in positive:
        if not _is_number(training[key]) or training[key] <= 0:
            raise fail(key, "must be a positive finite number")
    for key in ("l2", "decay_exponent"):
        if not _is_number(training[key]) or training[key] < 0:
            raise fail(key, "must be a finite number >= 0")
    if not _is_number(training["momentum"]) or not 0 <= training["momentum"] < 1:
        raise fail("momentum", "must be in [0, 1)")
    if not isinstance(training["nesterov"], bool):
        raise fail("nesterov", "must be true or false")
    clip = training["clip_norm"]
    if clip is not None and (not _is_number(clip) or clip <= 0):
        raise fail("clip_norm", "must be null or a positive number")
    for key in ("batch_size", "max_epochs", "patience", "checkpoint_every"):
        if not _is_int(training[key]) or training[key] < 1:
            raise fail(key, "must be a positive integer")
    for key in ("seed", "warmup_records"):
        if not _is_int(training[key]) or training[key] < 0:
            raise fail(key, "must be an integer >= 0")
    for key in ("validation_fraction", "holdout_fraction"):
        if not _is_number(training[key]) or not 0 <= training[key] < 1:
            raise fail(key, "must be in [0, 1)")
