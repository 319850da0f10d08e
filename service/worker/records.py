"""Reading a model's records in sequence order, a chunk per query.

Why reading "after the cursor" is safe (invariant 1): ingestion locks the
model's row ``FOR UPDATE`` before it inserts, and takes its sequence numbers
only after that, so the transactions that add one model's records run one at
a time and commit in sequence order. When a reader sees a record of a model,
every record of that model with a lower number has already committed; a
chunk read after the cursor can never be missing one that commits later.
(Other models' transactions interleave freely: the cursor is per model.)
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
import orjson
from numpy.typing import NDArray
from sqlalchemy import Text, cast, func, select
from sqlalchemy.orm import Session, sessionmaker

from service.store import RecordRow


def decode_json(value: str | bytes | float) -> Any:
    """The JSON decoder the worker's engine uses: orjson, several times faster
    than the standard library on record features, to the same values. SQLite
    hands a JSON column holding a bare number back as that number (its NUMERIC
    affinity converted it); SQLAlchemy's own decoder lets those through too."""
    if isinstance(value, int | float):
        return value
    return orjson.loads(value)


_COLUMNS = (RecordRow.seq, RecordRow.features, RecordRow.label, RecordRow.split)
# PostgreSQL: the json columns as their stored text (exactly what was sent),
# decoded here with orjson; psycopg's per-value JSON loader costs several times
# more. (Not on SQLite: there a JSON number may come back as a REAL, whose
# conversion to text keeps only 15 digits.)
_TEXT_COLUMNS = (RecordRow.seq, cast(RecordRow.features, Text), cast(RecordRow.label, Text),
                 RecordRow.split)


def record_columns(session: Session) -> tuple[Any, ...]:
    return _TEXT_COLUMNS if session.get_bind().dialect.name == "postgresql" else _COLUMNS


def to_chunk(session: Session, rows: list[Any]) -> RecordChunk:
    return RecordChunk.from_rows(rows, as_text=session.get_bind().dialect.name == "postgresql")


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
    def from_rows(cls, rows: list[Any], as_text: bool = False) -> RecordChunk:
        """From (seq, features, label, split) rows; ``as_text``: the JSON
        columns are still text to decode."""
        features = [row[1] for row in rows]
        labels = [row[2] for row in rows]
        if as_text:
            features = [orjson.loads(value) for value in features]
            labels = [None if value is None else orjson.loads(value) for value in labels]
        return cls(
            seqs=np.fromiter((row[0] for row in rows), dtype=np.int64, count=len(rows)),
            features=features,
            labels=labels,
            is_train=np.fromiter((row[3] == "train" for row in rows), dtype=bool, count=len(rows)),
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
    rows = session.execute(query.order_by(RecordRow.seq).limit(limit)).all()
    return to_chunk(session, rows)


def read_latest_holdout(session: Session, model_id: int, upto: int, limit: int) -> RecordChunk:
    """The latest ``limit`` holdout records with ``seq <= upto``, in sequence order."""
    rows = session.execute(
        select(*record_columns(session))
        .where(
            RecordRow.model_id == model_id,
            RecordRow.seq <= upto,
            RecordRow.split == "holdout",
        )
        .order_by(RecordRow.seq.desc())
        .limit(limit)
    ).all()
    rows.reverse()
    return to_chunk(session, rows)


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
            rows = session.execute(query.order_by(RecordRow.seq).limit(chunk_records)).all()
            chunk = to_chunk(session, rows)
        if not rows:
            return
        yield chunk
        after = int(chunk.seqs[-1])
