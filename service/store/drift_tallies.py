"""Writing and summing the drift tallies (``drift_tallies``).

Each API process writes only rows of its own ``writer``, and writes each row
whole (its running totals for the hour), so a flush is an update of the row
if it exists and an insert if not, with no other process ever writing the
same row: no lock is waited on but the row's own, and a flush repeated after
a failure writes the same totals again.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson
from numpy.typing import NDArray
from sqlalchemy import Text, cast, func, insert, select, type_coerce, update
from sqlalchemy.orm import Session

from service.store.tables import DriftTallyRow, utcnow


@dataclass(frozen=True)
class Tally:
    """One process's totals for a model's version in one hour."""

    model_id: int
    version_id: int
    bucket_start: dt.datetime
    predictions: int
    counts: Mapping[str, list[int]]


def write_tallies(session: Session, writer: str, tallies: Iterable[Tally]) -> None:
    """Store each of ``tallies`` as ``writer``'s row (in the caller's transaction)."""
    now = utcnow()
    for tally in tallies:
        key = (DriftTallyRow.model_id == tally.model_id,
               DriftTallyRow.version_id == tally.version_id,
               DriftTallyRow.bucket_start == tally.bucket_start,
               DriftTallyRow.writer == writer)
        values = {"predictions": tally.predictions, "counts": dict(tally.counts),
                  "updated_at": now}
        done = session.execute(update(DriftTallyRow).where(*key).values(**values))
        if not done.rowcount:  # type: ignore[attr-defined]
            session.execute(insert(DriftTallyRow).values(
                model_id=tally.model_id, version_id=tally.version_id,
                bucket_start=tally.bucket_start, writer=writer, **values))


@dataclass(frozen=True)
class Summed:
    """Every writer's counts of a model's version since a time, added up."""

    predictions: int
    counts: dict[str, NDArray[np.int64]]
    rows: int


def sum_tallies(session: Session, model_id: int, version_id: int, since: dt.datetime,
                sizes: Mapping[str, int]) -> Summed:
    """The tallies of ``version_id`` in hours starting at or after ``since``,
    summed per field (``sizes``: each field's number of bins; a stored list of
    another length, from bins that have since changed, is left out)."""
    dialect = session.get_bind().dialect.name
    # The counts as their stored text, decoded by orjson in one call (see
    # service.store.record_log: SQLAlchemy's per-value JSON decoding is dearer).
    text = cast(DriftTallyRow.counts, Text) if dialect == "postgresql" \
        else type_coerce(DriftTallyRow.counts, Text)
    rows = session.connection().execute(
        select(DriftTallyRow.predictions, text).where(
            DriftTallyRow.model_id == model_id, DriftTallyRow.version_id == version_id,
            DriftTallyRow.bucket_start >= since)).all()
    decoded: list[dict[str, Any]] = orjson.loads("[" + ",".join(r[1] for r in rows) + "]") \
        if rows else []
    totals = {}
    for name, size in sizes.items():
        # One array per field from every row's list, summed in one call.
        lists = [c[name] for c in decoded if len(c.get(name) or ()) == size]
        totals[name] = np.array(lists, dtype=np.int64).sum(axis=0) if lists \
            else np.zeros(size, dtype=np.int64)
    predictions = sum(int(r[0]) for r in rows)
    return Summed(predictions, totals, len(rows))


def count_tally_rows(session: Session, model_id: int) -> int:
    return int(session.scalar(select(func.count()).select_from(DriftTallyRow).where(
        DriftTallyRow.model_id == model_id)) or 0)
