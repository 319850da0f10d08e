"""Reading a model's stored records whole (key and time included), a chunk
per short transaction, for taking the data out.

The same keyset paging as the worker's reads (service/store/record_log.py):
``seq > after`` on the ``(model_id, seq)`` index, ``LIMIT`` a chunk, one short
read transaction each, so memory and open transactions stay flat whatever
the count. The JSON columns come back as their stored text and are decoded a
column at a time by the worker's decoder (one orjson call per chunk).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Text, func, select, type_coerce
from sqlalchemy.orm import Session, sessionmaker

from service.store.record_log import decode_named, json_text
from service.store.tables import RecordRow


@dataclass(frozen=True)
class RecordFilter:
    """Which records: ``after < seq <= upto``, of ``split`` (both when None),
    received at or after ``since`` and before ``until`` (either open)."""

    after: int = 0
    upto: int | None = None
    split: str | None = None
    since: dt.datetime | None = None
    until: dt.datetime | None = None


@dataclass
class StoredRecords:
    """A chunk of records in sequence order, column by column."""

    seqs: list[int]
    keys: list[str | None]
    splits: list[str]
    times: list[str]  # RFC 3339, UTC: "2026-12-03T14:20:25.123456+00:00"
    features: list[dict[str, Any]]
    labels: list[Any]

    def __len__(self) -> int:
        return len(self.seqs)


def read_stored(session: Session, model_id: int, which: RecordFilter, limit: int
                ) -> StoredRecords:
    """Up to ``limit`` records matching ``which``, in sequence order."""
    dialect = session.get_bind().dialect.name
    # SQLite keeps a time as text: read it so, and convert each distinct one
    # once (a batch's records share theirs), not once a row. PostgreSQL spells
    # it in RFC 3339 itself (in UTC, whatever the session's zone and date
    # style): no timestamp object per row to build, hash and format.
    received = (type_coerce(RecordRow.received_at, Text) if dialect == "sqlite"
                else func.to_char(func.timezone("UTC", RecordRow.received_at),
                                  _PG_RFC3339))
    query = select(RecordRow.seq, RecordRow.key, RecordRow.split, received,
                   json_text(RecordRow.features, dialect),
                   json_text(RecordRow.label, dialect)).where(
        RecordRow.model_id == model_id, RecordRow.seq > which.after)
    if which.upto is not None:
        query = query.where(RecordRow.seq <= which.upto)
    if which.split is not None:
        query = query.where(RecordRow.split == which.split)
    if which.since is not None:
        query = query.where(RecordRow.received_at >= which.since)
    if which.until is not None:
        query = query.where(RecordRow.received_at < which.until)
    rows = session.connection().execute(query.order_by(RecordRow.seq).limit(limit)).all()
    if not rows:
        return StoredRecords([], [], [], [], [], [])
    seqs, keys, splits, times, features, labels = (list(column) for column in zip(*rows,
                                                                                 strict=True))
    if dialect == "sqlite":
        texts: dict[Any, str] = {}
        times = [texts.get(t) or texts.setdefault(t, _rfc3339(t)) for t in times]
    else:  # as isoformat() writes a time without microseconds
        times = [t if not t.endswith(_NO_MICROSECONDS) else t[:-13] + "+00:00" for t in times]
    return StoredRecords(seqs, keys, splits, times,
                         decode_named(features, seqs, "features are"),
                         decode_named(labels, seqs, "label is"))


_PG_RFC3339 = 'YYYY-MM-DD"T"HH24:MI:SS.US"+00:00"'
_NO_MICROSECONDS = ".000000+00:00"


def _rfc3339(moment: dt.datetime | str) -> str:
    """A stored time as RFC 3339 in UTC. SQLite's is text without its zone
    (SQLAlchemy writes it so); it was written in UTC."""
    if isinstance(moment, str):
        moment = dt.datetime.fromisoformat(moment)
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=dt.UTC)
    return moment.astimezone(dt.UTC).isoformat()


def iter_stored(sessions: sessionmaker[Session], model_id: int, which: RecordFilter,
                chunk_records: int, limit: int | None = None) -> Iterator[StoredRecords]:
    """Every record matching ``which`` (at most ``limit``), ``chunk_records`` per
    read transaction; none stays open while the caller works on a chunk."""
    after, left = which.after, limit
    while left is None or left > 0:
        size = chunk_records if left is None else min(chunk_records, left)
        with sessions() as session:
            chunk = read_stored(session, model_id, RecordFilter(
                after, which.upto, which.split, which.since, which.until), size)
        if not len(chunk):
            return
        yield chunk
        after = chunk.seqs[-1]
        if left is not None:
            left -= len(chunk)
