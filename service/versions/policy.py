"""The promotion policy: when a new version should replace the active one.

A pure rule over two versions' metrics; ``service.versions.decide`` applies it
for the worker's ``auto`` mode and ``service.versions.promote`` moves the pointer.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

# The primary holdout metric per task; lower is better for both.
PRIMARY_METRIC = {"binary": "log_loss", "multiclass": "log_loss", "regression": "rmse"}

# "At least as good within a tolerance": the new metric may exceed the active
# one by 1 % of it (plus a tiny absolute slack for metrics near zero). Noise in
# a holdout estimate is rarely below a percent, so a stricter rule would keep
# an old version active over a new one that is, in truth, just as good.
RELATIVE_TOLERANCE = 0.01
ABSOLUTE_TOLERANCE = 1e-9


def primary_metric(spec: Mapping[str, Any]) -> str:
    """The holdout metric that decides promotion for this model's task."""
    return PRIMARY_METRIC[str(spec["task"])]


def should_promote(
    spec: Mapping[str, Any],
    new_metrics: Mapping[str, Any] | None,
    active_metrics: Mapping[str, Any] | None,
) -> bool:
    """True when a version with ``new_metrics`` should replace the active one.

    Both arguments are a version's metrics mapping (``{"holdout": {...},
    "prequential": {...}}``), ideally computed on the same holdout rows. The
    policy: the new version's primary holdout metric (``log_loss`` for
    classification, ``rmse`` for regression; lower is better) is at most the
    active one's plus the tolerance. Without an active metric to beat (no
    active version, or no holdout records when it was evaluated) the new
    version wins, unless its own metric is non-finite; a new version without a
    metric never beats an active one that has one.
    """
    name = primary_metric(spec)
    new_value = holdout_value(new_metrics, name)
    if new_value is not None and not math.isfinite(new_value):
        return False
    active_value = holdout_value(active_metrics, name)
    if active_value is None or not math.isfinite(active_value):
        return True
    if new_value is None:
        return False
    slack = RELATIVE_TOLERANCE * abs(active_value) + ABSOLUTE_TOLERANCE
    return new_value <= active_value + slack


def holdout_value(metrics: Mapping[str, Any] | None, name: str) -> float | None:
    holdout = (metrics or {}).get("holdout") or {}
    value = holdout.get(name)
    return None if value is None else float(value)
