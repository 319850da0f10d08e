"""Reading a model's records in sequence order, a chunk per query.

Why reading "after the cursor" is safe (docs/architecture.md, invariant 1):
ingestion locks the model's row (``FOR NO KEY UPDATE``) before it inserts,
and takes its sequence numbers only after that, so the transactions that add
one model's records run one at a time and commit in sequence order. When a
reader sees a record of a model, every record of that model with a lower
number has already committed; a chunk read after the cursor can never be
missing one that commits later.
(Other models' transactions interleave freely: the cursor is per model.)
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson
from numpy.typing import NDArray
from sqlalchemy import Text, cast, func, select, type_coerce
from sqlalchemy.orm import Session, sessionmaker

from service.store.tables import RecordRow


def decode_json(value: str | bytes | float) -> Any:
    """The JSON decoder the worker's engine uses: orjson, several times faster
    than the standard library on record features, to the same values. SQLite
    hands a JSON column holding a bare number back as that number (its NUMERIC
    affinity converted it); SQLAlchemy's own decoder lets those through too."""
    if isinstance(value, int | float):
        return value
    return orjson.loads(value)


def decode_column(values: Sequence[Any]) -> list[Any]:
    """A column of stored JSON texts -> their values, in one orjson call.

    Each text is one JSON document the service wrote, so joined with commas
    inside brackets they are one array of exactly as many values: one parse
    instead of one call per record (measured about twice as fast on 20-field
    records). Anything else (a bare number SQLite converted, an SQL NULL, a
    count that does not match) takes the per-value path, which decodes or
    fails exactly as before."""
    try:
        decoded = orjson.loads("[" + ",".join(values) + "]")
    except (TypeError, orjson.JSONDecodeError):
        decoded = None
    if isinstance(decoded, list) and len(decoded) == len(values):
        return decoded
    return [None if value is None else decode_json(value) for value in values]


def json_text(column: Any, dialect: str) -> Any:
    """A JSON column as its stored text, decoded by :func:`decode_column` (not
    by SQLAlchemy's per-value result processor, several times dearer).
    PostgreSQL: cast to text (psycopg's per-value JSON loader is dearer still).
    SQLite: read as it is stored, without a CAST: a JSON number may have been
    converted to a REAL there, whose conversion to text keeps only 15 digits."""
    return cast(column, Text) if dialect == "postgresql" else type_coerce(column, Text)


def record_columns(session: Session) -> tuple[Any, ...]:
    dialect = session.get_bind().dialect.name
    return (RecordRow.seq, json_text(RecordRow.features, dialect),
            json_text(RecordRow.label, dialect), RecordRow.split)


def fetch_chunk(session: Session, query: Any) -> RecordChunk:
    """Run a select of :func:`record_columns` on the session's connection
    (Core rows: no ORM loading per row) and decode it column by column."""
    return RecordChunk.from_rows(session.connection().execute(query).all())


class UnreadableRecord(ValueError):
    """A stored record whose features or label cannot be decoded (a damaged
    row): the message names the record; ``detail`` is what the decoder said
    (for the log, not for an answer)."""

    def __init__(self, message: str, detail: str | None = None) -> None:
        super().__init__(message)
        self.detail = detail


def decode_named(values: Sequence[Any], seqs: Sequence[int], what: str) -> list[Any]:
    """:func:`decode_column`, and on failure an :class:`UnreadableRecord`
    naming the first record that does not decode (the one-call path cannot
    say which; only a failure pays for finding it)."""
    try:
        return decode_column(values)
    except ValueError:
        for seq, value in zip(seqs, values, strict=True):
            try:
                None if value is None else decode_json(value)
            except ValueError as exc:
                raise UnreadableRecord(
                    f"record {seq} cannot be read: its {what} not valid JSON", str(exc)
                ) from None
        raise


@dataclass
class RecordChunk:
    """Records in sequence order, column by column."""

    seqs: NDArray[np.int64]
    features: list[dict[str, Any]]
    labels: list[Any]
    is_train: NDArray[np.bool_]

    def __len__(self) -> int:
        return len(self.seqs)

    @classmethod
    def from_rows(cls, rows: Sequence[Any]) -> RecordChunk:
        """From (seq, features text, label text, split) rows."""
        if not rows:
            return cls(seqs=np.empty(0, dtype=np.int64), features=[], labels=[],
                       is_train=np.empty(0, dtype=bool))
        seqs, features, labels, splits = zip(*rows, strict=True)
        return cls(
            seqs=np.array(seqs, dtype=np.int64),
            features=decode_named(features, seqs, "features are"),
            labels=decode_named(labels, seqs, "label is"),
            is_train=np.fromiter(map("train".__eq__, splits), dtype=bool, count=len(splits)),
        )


def read_after(
    session: Session, model_id: int, after: int, limit: int, split: str | None = None
) -> RecordChunk:
    """Up to ``limit`` records with ``seq > after``, in sequence order."""
    query = select(*record_columns(session)).where(
        RecordRow.model_id == model_id, RecordRow.seq > after
    )
    if split is not None:
        query = query.where(RecordRow.split == split)
    return fetch_chunk(session, query.order_by(RecordRow.seq).limit(limit))


def read_latest_holdout(session: Session, model_id: int, upto: int, limit: int,
                        split: str = "holdout") -> RecordChunk:
    """The latest ``limit`` records of ``split`` (holdout unless told) with
    ``seq <= upto``, in sequence order."""
    rows = session.connection().execute(
        select(*record_columns(session))
        .where(
            RecordRow.model_id == model_id,
            RecordRow.seq <= upto,
            RecordRow.split == split,
        )
        .order_by(RecordRow.seq.desc())
        .limit(limit)
    ).all()
    return RecordChunk.from_rows(rows[::-1])


def latest_chunks(session: Session, model_id: int, upto: int, limit: int, chunk_records: int,
                  split: str = "holdout") -> Iterator[RecordChunk]:
    """The records :func:`read_latest_holdout` returns, in sequence order, a
    chunk per query on ``session``: the rows never exist as Python objects all
    at once, however large ``limit`` is."""
    if limit <= 0:
        return
    # The record just before the latest ``limit``: reading after it reads them.
    after = session.execute(
        select(RecordRow.seq)
        .where(RecordRow.model_id == model_id, RecordRow.seq <= upto, RecordRow.split == split)
        .order_by(RecordRow.seq.desc()).offset(limit).limit(1)
    ).scalar()
    after = int(after or 0)
    while True:
        chunk = fetch_chunk(session, select(*record_columns(session)).where(
            RecordRow.model_id == model_id, RecordRow.seq > after, RecordRow.seq <= upto,
            RecordRow.split == split).order_by(RecordRow.seq).limit(chunk_records))
        if not len(chunk):
            return
        yield chunk
        after = int(chunk.seqs[-1])


def count_records(
    session: Session, model_id: int, after: int = 0, upto: int | None = None,
    split: str | None = None,
) -> int:
    """How many records have ``after < seq <= upto`` (and the split, if given)."""
    query = select(func.count()).select_from(RecordRow).where(
        RecordRow.model_id == model_id, RecordRow.seq > after
    )
    if upto is not None:
        query = query.where(RecordRow.seq <= upto)
    if split is not None:
        query = query.where(RecordRow.split == split)
    return int(session.execute(query).scalar_one())


def last_seq(session: Session, model_id: int) -> int:
    """The highest sequence number stored for the model (0 when none)."""
    value = session.execute(
        select(func.max(RecordRow.seq)).where(RecordRow.model_id == model_id)
    ).scalar_one()
    return int(value or 0)


def iter_chunks(
    sessions: sessionmaker[Session],
    model_id: int,
    upto: int,
    chunk_records: int,
    split: str | None = None,
    after: int = 0,
) -> Iterator[RecordChunk]:
    """Every record with ``after < seq <= upto`` in chunks, one short read
    transaction per chunk (keyset paging: no transaction stays open while the
    caller works on a chunk, and no chunk re-reads earlier rows)."""
    while True:
        with sessions() as session:
            query = select(*record_columns(session)).where(
                RecordRow.model_id == model_id, RecordRow.seq > after, RecordRow.seq <= upto
            )
            if split is not None:
                query = query.where(RecordRow.split == split)
            chunk = fetch_chunk(session, query.order_by(RecordRow.seq).limit(chunk_records))
        if not len(chunk):
            return
        yield chunk
        after = int(chunk.seqs[-1])
