"""How large a model may be: the size limits a spec must keep to be stored.

A model's size is paid again and again after it is created: its spec is in
every answer that lists it, its network in every step and prediction, and its
snapshot in every version the worker writes. So a spec is refused (422) at
creation, every limit it breaks named with the limit, when it declares more
features, levels or classes than the settings allow, when its network has more
parameters (counted by engine.sizes), or when its ``checkpoint_every`` would
write more than ``KEELSON_MAX_VERSION_BYTES_PER_RECORD`` snapshot bytes per
record (the answer states the smallest spacing allowed for this network; why
it is refused rather than widened: docs/architecture.md, "Size limits"). The
spec's own bytes are bounded before it is parsed (``spec_bytes_error``).

Models stored before a limit was lowered keep their spec: a limit governs
what may be created.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from engine.sizes import min_checkpoint_every, parameter_count, snapshot_bytes


@dataclass(frozen=True)
class ModelLimits:
    spec_bytes: int
    features: int
    levels: int
    classes: int
    parameters: int
    version_bytes_per_record: int

    @classmethod
    def from_config(cls, config: Mapping[str, Any]) -> ModelLimits:
        return cls(spec_bytes=int(config["KEELSON_MAX_SPEC_BYTES"]),
                   features=int(config["KEELSON_MAX_FEATURES"]),
                   levels=int(config["KEELSON_MAX_LEVELS"]),
                   classes=int(config["KEELSON_MAX_CLASSES"]),
                   parameters=int(config["KEELSON_MAX_PARAMETERS"]),
                   version_bytes_per_record=int(config["KEELSON_MAX_VERSION_BYTES_PER_RECORD"]))


def spec_bytes_error(size: int, limits: ModelLimits) -> str | None:
    """Why a spec of ``size`` bytes is refused, or None."""
    if size <= limits.spec_bytes:
        return None
    return (f"The spec is {size:,} bytes; at most {limits.spec_bytes:,} "
            "(KEELSON_MAX_SPEC_BYTES).")


def size_errors(spec: Mapping[str, Any], limits: ModelLimits) -> dict[str, list[str]]:
    """Field path -> why, for every limit the full spec (defaults filled) breaks."""
    errors: dict[str, list[str]] = {}
    features = spec["features"]
    if len(features) > limits.features:
        errors["features"] = [f"{len(features):,} features; at most {limits.features:,} "
                              "(KEELSON_MAX_FEATURES)."]
    for i, feature in enumerate(features):
        levels = feature.get("levels") or ()
        if len(levels) > limits.levels:
            errors[f"features.{i}.levels"] = [
                f"{len(levels):,} levels; at most {limits.levels:,} (KEELSON_MAX_LEVELS)."]
    classes = spec["classes"] or ()
    if len(classes) > limits.classes:
        errors["classes"] = [f"{len(classes):,} classes; at most {limits.classes:,} "
                             "(KEELSON_MAX_CLASSES)."]
    if errors:  # the network's size follows from those: no count before they fit
        return errors
    parameters = parameter_count(spec)
    if parameters > limits.parameters:
        errors["hidden_layers"] = [
            f"This network has {parameters:,} parameters (weights and biases); at most "
            f"{limits.parameters:,} (KEELSON_MAX_PARAMETERS)."]
        return errors
    every = spec["training"]["checkpoint_every"]
    smallest = min_checkpoint_every(spec, limits.version_bytes_per_record)
    if every < smallest:
        errors["training.checkpoint_every"] = [
            f"A version of this network takes up to {snapshot_bytes(spec):,} bytes; to "
            f"write at most {limits.version_bytes_per_record:,} bytes per record "
            f"(KEELSON_MAX_VERSION_BYTES_PER_RECORD), checkpoint_every must be at least "
            f"{smallest:,}."]
    return errors
