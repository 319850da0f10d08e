"""Use case: how far the fields of recent predictions have moved from what the
active version learned from (GET /v1/models/{name}/drift, docs/http-api.md).

Reads the version's reference bins (this process's cache, else 10,000
records once) and the tallies of the window: every API process's rows added
up, one row per process and hour (service/store/drift_tallies.py), so the
cost grows with the window and the number of processes, not with the number
of predictions.
"""

from __future__ import annotations

import datetime as dt
import math
from typing import Any

from engine.drift import STATUSES
from engine.drift_bins import FieldBins, compare
from service.errors import ConflictError, KeelsonError
from service.store.database import Database
from service.store.drift_tallies import sum_tallies
from service.store.tables import utcnow
from service.usecases.drift_reference import ReferenceCache
from service.versions.cache import ModelEntry

DEFAULT_WINDOW_DAYS, MAX_WINDOW_DAYS = 7, 366
HOUR = dt.timedelta(hours=1)


class ReferenceGoneError(KeelsonError):
    """The active version was deleted between reading the pointer and its records."""

    status = 503


def drift_report(database: Database, references: ReferenceCache, entry: ModelEntry,
                 window_days: int = DEFAULT_WINDOW_DAYS,
                 now: dt.datetime | None = None) -> dict[str, Any]:
    """The drift answer for ``entry``'s active version over the last ``window_days``
    (whole hours: the window starts at the top of the hour it begins in)."""
    if entry.active_version_id is None or entry.active_version_number is None:
        raise ConflictError(f"Model {entry.name!r} has no active version yet: there is no "
                            "reference to compare predictions with.")
    return version_drift(database, references, entry, entry.active_version_id,
                         entry.active_version_number, window_days, now)


def window_start(window_days: int, now: dt.datetime | None = None) -> dt.datetime:
    """The first hour of a window of ``window_days`` days ending ``now``."""
    until = now or utcnow()
    return (until - dt.timedelta(days=window_days)).replace(minute=0, second=0, microsecond=0)


def version_drift(database: Database, references: ReferenceCache, entry: ModelEntry,
                  version_id: int, number: int, window_days: int = DEFAULT_WINDOW_DAYS,
                  now: dt.datetime | None = None) -> dict[str, Any]:
    """The drift answer's figures for the predictions version ``version_id``
    (number ``number``) served, against what that version learned from."""
    bins = references.load(version_id)
    if bins is None:
        raise ReferenceGoneError(f"The active version of model {entry.name!r} changed while "
                                 "this was answered; ask again.")
    until = now or utcnow()
    since = window_start(window_days, until)
    with database.read() as session:
        summed = sum_tallies(session, entry.id, version_id, since,
                             {b.name: b.size for b in bins})
    fields = [_field(b, summed.counts[b.name]) for b in bins]
    statuses = [f["status"] for f in fields if f["status"] is not None]
    return {
        "model": entry.name,
        "version": number,
        "window": {"days": window_days, "since": since.isoformat(),
                   "until": until.isoformat()},
        "reference_records": int(bins[0].reference.sum()) if bins else 0,
        "recent_predictions": summed.predictions,
        "status": max(statuses, key=STATUSES.index) if statuses else None,
        "fields": fields,
    }


def _field(bins: FieldBins, recent: Any) -> dict[str, Any]:
    result = compare(bins, recent)
    return {
        "name": bins.name,
        "type": bins.kind,
        "psi": _number(result.psi),
        "status": result.status,
        "ks": None if result.ks is None else {
            "statistic": result.ks.statistic, "statistic_bound": result.ks.statistic_bound,
            "p_value": result.ks.p_value},
        "chi_square": None if result.chi_square is None else {
            "statistic": result.chi_square.statistic, "dof": result.chi_square.dof,
            "p_value": result.chi_square.p_value},
        "bins": list(bins.psi_labels),
        "reference_counts": bins.psi_counts(bins.reference).tolist(),
        "recent_counts": bins.psi_counts(recent).tolist(),
    }


def _number(value: float) -> float | None:
    return None if math.isnan(value) else value
