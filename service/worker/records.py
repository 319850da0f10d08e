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
from sqlalchemy import func, select
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
    def from_rows(cls, rows: list[Any]) -> RecordChunk:
        return cls(
            seqs=np.fromiter((row[0] for row in rows), dtype=np.int64, count=len(rows)),
            features=[row[1] for row in rows],
            labels=[row[2] for row in rows],
            is_train=np.fromiter((row[3] == "train" for row in rows), dtype=bool, count=len(rows)),
        )

    def slice(self, start: int, stop: int) -> RecordChunk:
        return RecordChunk(
            self.seqs[start:stop],
            self.features[start:stop],
            self.labels[start:stop],
            self.is_train[start:stop],
        )


def read_after(
    session: Session, model_id: int, after: int, limit: int, split: str | None = None
) -> RecordChunk:
    """Up to ``limit`` records with ``seq > after``, in sequence order."""
    query = select(*_COLUMNS).where(RecordRow.model_id == model_id, RecordRow.seq > after)
    if split is not None:
        query = query.where(RecordRow.split == split)
    rows = session.execute(query.order_by(RecordRow.seq).limit(limit)).all()
    return RecordChunk.from_rows(rows)


def read_latest_holdout(session: Session, model_id: int, upto: int, limit: int) -> RecordChunk:
    """The latest ``limit`` holdout records with ``seq <= upto``, in sequence order."""
    rows = session.execute(
        select(*_COLUMNS)
        .where(
            RecordRow.model_id == model_id,
            RecordRow.seq <= upto,
            RecordRow.split == "holdout",
        )
        .order_by(RecordRow.seq.desc())
        .limit(limit)
    ).all()
    rows.reverse()
    return RecordChunk.from_rows(rows)


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
            query = select(*_COLUMNS).where(
                RecordRow.model_id == model_id, RecordRow.seq > after, RecordRow.seq <= upto
            )
            if split is not None:
                query = query.where(RecordRow.split == split)
            rows = session.execute(query.order_by(RecordRow.seq).limit(chunk_records)).all()
        if not rows:
            return
        chunk = RecordChunk.from_rows(rows)
        yield chunk
        after = int(chunk.seqs[-1])
