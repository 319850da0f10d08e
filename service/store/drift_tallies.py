"""Writing and summing the drift tallies (``drift_tallies``).

Each API process writes only rows of its own ``writer``, and writes each row
whole (its running totals for the hour), so a flush is an update of the row
if it exists and an insert if not, with no other process ever writing the
same row: no lock is waited on but the row's own, and a flush repeated after
a failure writes the same totals again.

A row's counts are every field's counts over the version's bins, fields in
the spec's order, as little-endian int64 bytes: the bins of a version never
change (its reference records and its spec do not), so their sizes say where
each field's counts start.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import func, insert, select, update
from sqlalchemy.orm import Session

from service.store.tables import DriftTallyRow, VersionRow, utcnow

COUNT = np.dtype("<i8")


@dataclass(frozen=True)
class Tally:
    """One process's totals for a model's version in one hour: ``counts``,
    each field's counts in the spec's order."""

    model_id: int
    version_id: int
    bucket_start: dt.datetime
    predictions: int
    counts: Sequence[Sequence[int]]

    def packed(self) -> bytes:
        return np.fromiter((c for field in self.counts for c in field), dtype=COUNT).tobytes()


def write_tallies(session: Session, writer: str, tallies: Iterable[Tally]) -> None:
    """Store each of ``tallies`` as ``writer``'s row (in the caller's transaction).

    A tally of a version that is gone (its model was deleted while this
    process still counted its predictions) is dropped: its row could not
    reference the version, and a flush that failed on it would fail for every
    model, every time."""
    now = utcnow()
    tallies = list(tallies)
    there = set(session.scalars(select(VersionRow.id).where(
        VersionRow.id.in_({tally.version_id for tally in tallies}))))
    for tally in tallies:
        if tally.version_id not in there:
            continue
        key = (DriftTallyRow.model_id == tally.model_id,
               DriftTallyRow.version_id == tally.version_id,
               DriftTallyRow.bucket_start == tally.bucket_start,
               DriftTallyRow.writer == writer)
        values = {"predictions": tally.predictions, "counts": tally.packed(),
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
    summed per field (``sizes``: each field's number of bins, in the spec's
    order; a row of another length is left out)."""
    rows = session.connection().execute(
        select(DriftTallyRow.predictions, DriftTallyRow.counts).where(
            DriftTallyRow.model_id == model_id, DriftTallyRow.version_id == version_id,
            DriftTallyRow.bucket_start >= since)).all()
    width = sum(sizes.values())
    blobs = [bytes(r[1]) for r in rows if len(r[1]) == width * COUNT.itemsize]
    total = np.frombuffer(b"".join(blobs), dtype=COUNT).reshape(len(blobs), width).sum(
        axis=0, dtype=np.int64) if blobs else np.zeros(width, dtype=np.int64)
    counts, start = {}, 0
    for name, size in sizes.items():
        counts[name] = total[start:start + size]
        start += size
    return Summed(sum(int(r[0]) for r in rows), counts, len(rows))


def count_tally_rows(session: Session, model_id: int) -> int:
    return int(session.scalar(select(func.count()).select_from(DriftTallyRow).where(
        DriftTallyRow.model_id == model_id)) or 0)
