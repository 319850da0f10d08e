"""Deciding whether a new version should become active (``promotion: auto``).

The new version and the active one are scored on the same holdout window (the
latest holdout records at or before the new version's cursor), so the choice
is between two models on one set of rows, not between two numbers measured on
different data at different times. ``service.promotion.should_promote`` then
applies the policy.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from engine import Learner
from service.promotion import should_promote
from service.store import ModelRow, VersionRow
from service.worker.holdout import HoldoutWindow, evaluate
from service.worker.records import read_latest_holdout
from service.worker.versions import Promotion

ENCODER_KEY = "encoder"  # snapshot extra: which frozen encoding a version uses


def encoder_of(learner: Learner) -> str | None:
    value = (learner.extra or {}).get(ENCODER_KEY)
    return None if value is None else str(value)


class ActiveVersions:
    """The active version's learner, loaded once per version id (versions are
    immutable, so a cached one never goes stale)."""

    def __init__(self) -> None:
        self._id: int | None = None
        self._snapshot: bytes | None = None
        self._learner: Learner | None = None

    def remember(self, version_id: int, snapshot: bytes) -> None:
        """A version this worker just wrote and promoted: parsed only if needed."""
        self._id, self._snapshot, self._learner = version_id, snapshot, None

    def get(self, session: Session, version_id: int) -> Learner:
        if self._id != version_id:
            snapshot = session.execute(
                select(VersionRow.snapshot).where(VersionRow.id == version_id)
            ).scalar_one()
            self.remember(version_id, snapshot)
        if self._learner is None:
            assert self._snapshot is not None
            self._learner, self._snapshot = Learner.from_bytes(self._snapshot), None
        return self._learner


def decide(
    sessions: sessionmaker[Session],
    model_id: int,
    spec: dict[str, Any],
    new_metrics: dict[str, Any],
    window: HoldoutWindow,
    encoder: str | None,
    cursor: int,
    holdout_window: int,
    actives: ActiveVersions,
) -> Promotion | None:
    """Promotion(over=active id) when the new version should become active,
    None when it stays a candidate."""
    if spec.get("promotion", "auto") != "auto":
        return None
    with sessions() as session:
        active_id = session.execute(
            select(ModelRow.active_version_id).where(ModelRow.id == model_id)
        ).scalar_one()
        if active_id is None:
            return Promotion(over=None) if should_promote(spec, new_metrics, None) else None
        active = actives.get(session, active_id)
        if encoder is not None and encoder_of(active) == encoder:
            active_holdout = evaluate(active, window)
        else:
            # Another encoding (a retrain from scratch): encode the same rows its way.
            rows = read_latest_holdout(session, model_id, cursor, holdout_window)
            own = HoldoutWindow(holdout_window)
            if len(rows):
                own.extend(active.encode(rows.features), active.encode_labels(rows.labels))
            active_holdout = evaluate(active, own)
    if should_promote(spec, new_metrics, {"holdout": active_holdout}):
        return Promotion(over=active_id)
    return None
