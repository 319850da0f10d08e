"""The active version's holdout figure, measured on the new version's window.

The new version and the active one are scored on the same holdout window (the
latest holdout records at or before the new version's cursor), so the choice
is between two models on one set of rows, not between two numbers measured on
different data at different times. This module gathers that figure (reading the
active version when it must); ``service.versions.decide`` then decides, purely.

Scoring the active version over the whole window at every checkpoint would
double the evaluation work, so :class:`ActiveScore` keeps its primary metric
current instead: both primary metrics are means over rows (log loss of each
row; squared error under the root of RMSE), so the sum over the window
changes only by the rows that enter and leave it.
"""

from __future__ import annotations

import logging
import math
from typing import Any

from numpy.typing import NDArray
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from engine import EngineError, Learner
from service.store.record_log import latest_chunks
from service.store.tables import ModelRow, VersionRow
from service.versions.holdout import HOLDOUT_CHUNK, HoldoutWindow, evaluate, fill_window
from service.versions.policy import primary_metric

log = logging.getLogger("keelson.worker")

ENCODER_KEY = "encoder"  # snapshot extra: which frozen encoding a version uses
RECORDS_BEFORE_KEY = "records_before"  # snapshot extra: train records learned in batch


def encoder_of(learner: Learner) -> str | None:
    value = (learner.extra or {}).get(ENCODER_KEY)
    return None if value is None else str(value)


class ActiveScore:
    """The active version's primary holdout metric on one lineage's window,
    updated as rows enter and leave the window (mutable)."""

    def __init__(self, metric: str) -> None:
        self.metric = metric
        self.version_id: int | None = None
        self.learner: Learner | None = None
        self._total = 0.0
        self._n = 0

    def start(self, version_id: int, learner: Learner, holdout: dict[str, Any]) -> None:
        """Track ``learner`` (version ``version_id``), whose metrics on the
        current window are ``holdout``."""
        self.version_id, self.learner = version_id, learner
        self._n = int(holdout.get("n") or 0)
        value = holdout.get(self.metric)
        self._total = 0.0 if value is None or not self._n else self._sum(float(value), self._n)

    def forget(self) -> None:
        """Track nothing (``value()`` is None until ``start``)."""
        self.version_id, self.learner = None, None
        self._total, self._n = 0.0, 0

    def update(self, X_in: NDArray[Any], Y_in: NDArray[Any],
               X_out: NDArray[Any], Y_out: NDArray[Any]) -> None:
        """Rows entered (``_in``) and left (``_out``) the window."""
        if self.learner is None:
            return
        for X, Y, sign in ((X_in, Y_in, 1), (X_out, Y_out, -1)):
            if len(X):
                metrics = self.learner.evaluate(X, Y)
                self._total += sign * self._sum(float(metrics[self.metric]), len(X))
                self._n += sign * len(X)

    def value(self) -> float | None:
        if not self._n:
            return None
        mean = max(self._total, 0.0) / self._n
        return math.sqrt(mean) if self.metric == "rmse" else mean

    def _sum(self, value: float, n: int) -> float:
        return value * value * n if self.metric == "rmse" else value * n


UNREAD: Any = object()  # measure_active() reads the active version id itself


def read_active_id(session: Session, model_id: int) -> int | None:
    """The model's active version id (None when none is active)."""
    return session.execute(
        select(ModelRow.active_version_id).where(ModelRow.id == model_id)
    ).scalar_one()


def _score_from_scratch(session: Session, active: ActiveScore, active_id: int, model_id: int,
                        window: HoldoutWindow, encoder: str | None, cursor: int,
                        holdout_window: int) -> None:
    number, snapshot = session.execute(
        select(VersionRow.number, VersionRow.snapshot).where(VersionRow.id == active_id)
    ).one()
    try:
        if snapshot is None:  # retention never prunes an active version; treated as unreadable
            raise EngineError("its snapshot was pruned")
        learner = Learner.from_bytes(snapshot)
    except EngineError as exc:
        # It cannot serve either (the API answers 503 for it): nothing to
        # beat, so a readable new version replaces it (policy.should_promote).
        log.warning("model %s: active version %s cannot be loaded (%s); a new version "
                    "is not compared with it", model_id, number, exc)
        active.forget()
        return
    if encoder is not None and encoder_of(learner) == encoder:
        active.start(active_id, learner, evaluate(learner, window))
        return
    # Another encoding (a retrain from scratch): encode the same rows its way.
    # Not tracked: the window's rows are in the lineage's encoding.
    own = HoldoutWindow(holdout_window)
    fill_window(own, learner, latest_chunks(session, model_id, cursor, holdout_window,
                                            HOLDOUT_CHUNK))
    active.start(active_id, learner, evaluate(learner, own))
    active.learner = None  # a value for this decision only
    active.version_id = None


def new_active_score(spec: dict[str, Any]) -> ActiveScore:
    return ActiveScore(primary_metric(spec))


def measure_active(
    sessions: sessionmaker[Session],
    model_id: int,
    spec: dict[str, Any],
    window: HoldoutWindow,
    encoder: str | None,
    cursor: int,
    holdout_window: int,
    active: ActiveScore,
    active_id: Any = UNREAD,
) -> tuple[int | None, dict[str, Any] | None]:
    """(active version id, its metrics on this window) for the promotion decision;
    (None, None) when no version is active or the model promotes by hand (then
    nothing is read). ``active`` is used when it tracks the active version on
    this window, and set up to do so otherwise.

    ``active_id``: the active version id as the caller last read it (the
    online loop reads it in the transaction that read the records, instead of
    one more transaction per version). A stale value is safe: the version
    write promotes only if the active version is still the one decided
    against (writes.py), so the new version then stays a candidate."""
    if spec.get("promotion", "auto") != "auto":
        return None, None
    if active_id is UNREAD or (active_id is not None and active.version_id != active_id):
        with sessions() as session:
            if active_id is UNREAD:
                active_id = read_active_id(session, model_id)
            if active_id is not None and active.version_id != active_id:
                _score_from_scratch(session, active, active_id, model_id, window, encoder,
                                    cursor, holdout_window)
    if active_id is None:
        active.forget()
        return None, None
    return active_id, {"holdout": {active.metric: active.value()}}
