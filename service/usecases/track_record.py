"""Use case: fold accepted outcomes into the track record (live metrics and alarm).

The outcomes lane calls ``record_outcomes`` in the transaction that stores an
outcome batch, after it has joined each outcome with the scored case it
resolves. That transaction holds the model row lock (ingestion takes it, see
docs/architecture.md, invariant 1), so the read-modify-write of the day rows
and alarm rows below never races another batch of the same model: the sums
stay whole, and the alarm sees outcomes in the order they were accepted.

Per batch: one SELECT of the day rows it touches, one of the alarm rows, and
one write per (version, day) and per version. Nothing here reads cases.
"""

from __future__ import annotations

import datetime as dt
import zlib
from collections.abc import Mapping, Sequence
from typing import Any, NamedTuple

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import select
from sqlalchemy.orm import Session

import engine
from engine.metrics import AUC_BINS
from engine.track_record import AlarmState, Tally, case_losses, page_hinkley, relative_errors
from service.errors import InvalidInputError
from service.store.tables import ModelRow, TrackRecordAlarmRow, TrackRecordDayRow, utcnow
from service.usecases.predictions import class_key

_HISTOGRAM_DTYPE = np.dtype("<i8")
# The histogram is mostly empty bins: zlib (RFC 1950) at its fastest level
# keeps a day's 64 KiB in about 1 to 3 KiB, which the summary then reads.
_HISTOGRAM_COMPRESSION = 1


class JoinedOutcome(NamedTuple):
    """An accepted outcome joined with the scored case it resolves (a named
    tuple: a batch makes a thousand of them, at a fraction of a frozen
    dataclass's cost)."""

    version_id: int
    output: Any  # the stored served output: {"label", "probabilities"} or {"value"}
    label: Any  # the outcome's label, as the API takes it
    scored_at: dt.datetime
    outcome_at: dt.datetime


def full_spec(model: ModelRow) -> dict[str, Any]:
    """The model's spec with every default (the alarm's parameters among them)."""
    return engine.apply_defaults(engine.upgrade_legacy_spec(model.spec))


def outcome_day(moment: dt.datetime) -> dt.date:
    """The UTC day an outcome counts on (a naive time is UTC, as SQLite hands it back)."""
    if moment.tzinfo is None:
        return moment.date()
    return moment.astimezone(dt.UTC).date()


def record_outcomes(session: Session, model: ModelRow, joined: Sequence[JoinedOutcome]
                    ) -> None:
    """Add ``joined`` (in acceptance order) to the day sums and the alarms of
    ``model``, in the caller's transaction (which holds the model row lock)."""
    if not joined:
        return
    spec = full_spec(model)
    task = spec["task"]
    y, scores = served_arrays(task, spec["classes"], joined)
    by_day: dict[tuple[int, dt.date], list[int]] = {}
    by_version: dict[int, list[int]] = {}
    for index, outcome in enumerate(joined):
        by_day.setdefault((outcome.version_id, outcome_day(outcome.outcome_at)), []
                          ).append(index)
        by_version.setdefault(outcome.version_id, []).append(index)
    _add_to_days(session, model.id, task, y, scores, by_day)
    _run_alarms(session, model.id, task, spec["alarm"], y, scores, by_version, joined)


def served_arrays(task: str, classes: Sequence[Any] | None,
                  joined: Sequence[JoinedOutcome]) -> tuple[NDArray[Any], NDArray[np.float64]]:
    """Labels as class indices (or values) and the served scores in the
    engine's shapes; InvalidInputError when a label or output does not fit."""
    n = len(joined)
    if task == "regression":
        values = np.empty(n)
        served = np.empty((n, 1))
        for i, outcome in enumerate(joined):
            values[i] = float(outcome.label)
            output = outcome.output
            served[i, 0] = float(output["value"] if isinstance(output, Mapping) else output)
        if not (np.isfinite(values).all() and np.isfinite(served).all()):
            raise InvalidInputError("An outcome or a served value is not finite.")
        return values, served
    assert classes is not None
    keys = [class_key(c) for c in classes]
    index_of = {key: i for i, key in enumerate(keys)}
    labels = np.empty(n, dtype=np.int64)
    probabilities = np.empty((n, len(keys)))
    for i, outcome in enumerate(joined):
        try:
            labels[i] = index_of[class_key(outcome.label)]
            output = outcome.output
            given = output.get("probabilities", output)
            probabilities[i] = [given[key] for key in keys]
        except (KeyError, TypeError, AttributeError):
            raise InvalidInputError(
                f"Outcome {i}: its label or served output does not fit the classes.") from None
    if task == "binary":
        return labels, probabilities[:, 1:]
    return labels, probabilities


# ------------------------------------------------------------------ day sums
def tally_of_row(task: str, row: TrackRecordDayRow) -> Tally:
    histogram = None
    if row.auc_histogram is not None:
        histogram = np.frombuffer(zlib.decompress(row.auc_histogram),
                                  dtype=_HISTOGRAM_DTYPE).reshape(2, AUC_BINS).astype(np.int64)
    return Tally(task, n=row.n, correct=row.correct, log_loss_sum=row.log_loss_sum,
                 brier_sum=row.brier_sum, calibration=np.array(row.calibration, dtype=float),
                 auc_histogram=histogram, abs_sum=row.abs_sum, sq_sum=row.sq_sum,
                 y_mean=row.y_mean, y_m2=row.y_m2)


def write_tally(row: TrackRecordDayRow, tally: Tally) -> None:
    row.n, row.correct = tally.n, tally.correct
    row.log_loss_sum, row.brier_sum = tally.log_loss_sum, tally.brier_sum
    row.abs_sum, row.sq_sum, row.y_mean, row.y_m2 = (
        tally.abs_sum, tally.sq_sum, tally.y_mean, tally.y_m2)
    row.calibration = tally.calibration.tolist()
    row.auc_histogram = (None if tally.auc_histogram is None else zlib.compress(
        tally.auc_histogram.astype(_HISTOGRAM_DTYPE).tobytes(), _HISTOGRAM_COMPRESSION))


def _add_to_days(session: Session, model_id: int, task: str, y: NDArray[Any],
                 scores: NDArray[np.float64],
                 by_day: dict[tuple[int, dt.date], list[int]]) -> None:
    versions = {version for version, _ in by_day}
    days = {day for _, day in by_day}
    stored = {
        (row.version_id, row.day): row
        for row in session.scalars(select(TrackRecordDayRow).where(
            TrackRecordDayRow.model_id == model_id,
            TrackRecordDayRow.version_id.in_(versions),
            TrackRecordDayRow.day.in_(days)))
    }
    for (version_id, day), indices in by_day.items():
        tally = Tally.of(task, y[indices], scores[indices])
        row = stored.get((version_id, day))
        if row is None:
            row = TrackRecordDayRow(model_id=model_id, version_id=version_id, day=day)
            session.add(row)
        else:
            tally = tally_of_row(task, row).merged(tally)
        write_tally(row, tally)


# -------------------------------------------------------------------- alarms
def _run_alarms(session: Session, model_id: int, task: str, parameters: Mapping[str, float],
                y: NDArray[Any], scores: NDArray[np.float64],
                by_version: dict[int, list[int]], joined: Sequence[JoinedOutcome]) -> None:
    stored = {
        row.version_id: row
        for row in session.scalars(select(TrackRecordAlarmRow).where(
            TrackRecordAlarmRow.model_id == model_id,
            TrackRecordAlarmRow.version_id.in_(by_version)))
    }
    for version_id, indices in by_version.items():
        row = stored.get(version_id)
        if row is None:
            row = TrackRecordAlarmRow(model_id=model_id, version_id=version_id, n=0, mean=0.0,
                                      cumulative=0.0, minimum=0.0, error_sum=0.0)
            session.add(row)
        state = AlarmState(n=row.n, mean=row.mean, cumulative=row.cumulative,
                           minimum=row.minimum, error_sum=row.error_sum,
                           raised_at=None if row.raised_at is None else row.n)
        losses = case_losses(task, y[indices], scores[indices])
        errors = None
        if task == "regression":
            errors, losses = losses, relative_errors(state, losses)
        after = page_hinkley(state, losses, parameters["delta"], parameters["threshold"],
                             errors=errors)
        if row.raised_at is None and after.raised_at is not None:
            row.raised_at = joined[indices[after.raised_at - state.n - 1]].outcome_at
        row.n, row.mean, row.cumulative, row.minimum, row.error_sum = (
            after.n, after.mean, after.cumulative, after.minimum, after.error_sum)
        row.updated_at = utcnow()
