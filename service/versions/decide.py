"""The promotion decision (``promotion: auto``): a pure function of one context.

The caller gathers everything the decision reads into a :class:`PromotionContext`
(the new version's metrics, and the active version's on the same holdout rows,
see ``service.versions.compare``); :func:`decide` reads nothing else, so it can
be tested, and its reasons recorded, without a database.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from service.versions.policy import holdout_value, primary_metric, should_promote


@dataclass(frozen=True)
class Promotion:
    """The decision to promote, made against ``over`` (the active version id
    it was compared with, None when none was active). If another version was
    made active meanwhile (an admin's promotion), that choice stands and the
    new version stays a candidate. ``figures`` are what decided it, as the
    model's history shows them: the metric compared, and its holdout value
    for the new version and for the active one (None when there was none)."""

    over: int | None
    # What the decision is a record of, not part of it: equal decisions compare equal.
    figures: Mapping[str, Any] | None = field(default=None, compare=False)


@dataclass(frozen=True)
class PromotionContext:
    """What the decision reads: the model's spec (its promotion mode and task),
    the new version's metrics, and the active version (None: none active) with
    its metrics on the new version's holdout rows."""

    spec: Mapping[str, Any]
    new_metrics: Mapping[str, Any]
    active_id: int | None
    active_metrics: Mapping[str, Any] | None


def decide(context: PromotionContext) -> Promotion | None:
    """Promotion(over=active id) when the new version should become active,
    None when it stays a candidate."""
    if context.spec.get("promotion", "auto") != "auto":
        return None
    active = None if context.active_id is None else context.active_metrics
    if should_promote(context.spec, context.new_metrics, active):
        metric = primary_metric(context.spec)
        figures = {"metric": metric,
                   "new": holdout_value(context.new_metrics, metric),
                   "active": holdout_value(active, metric)}
        return Promotion(over=context.active_id, figures=figures)
    return None
