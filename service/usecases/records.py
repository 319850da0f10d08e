"""Use case: store a batch of labelled records, all or nothing.

The records arrive checked against one model's spec (by the HTTP layer, or by
``keelson import`` through the same rules); this stores them in one short
write transaction that locks the model row, makes sure the model is still the
one they were checked against, drops keys already stored, hands out sequence
numbers, inserts the rest in one executemany and bumps the model's counters.
Taking the model lock *before* sequence numbers are handed out means one
model's records commit in sequence order (docs/architecture.md, invariant 1): the
trainer can never see seq n+1 committed while seq n may still commit.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, select, text, update
from sqlalchemy.orm import Session, sessionmaker

from service.errors import ConflictError
from service.store.model_events import RECORDS_FORGOTTEN
from service.store.tables import ModelEventRow, ModelRow, RecordRow, utcnow
from service.store.value_lists import rows_matching
from service.usecases.common import find_model

_SPLIT_SCALE = float(2**64)


@dataclass(frozen=True)
class IngestResult:
    accepted: int
    duplicates: int


@dataclass(frozen=True, slots=True)
class CheckedRecords:
    """Records already checked against one model's spec.

    ``records`` are ``{"key"?, "features", "label"}`` with loaded values (numbers
    as floats, classes as declared); ``model_id`` and ``spec`` name what they
    were checked against, so they are never stored under another spec.
    """

    model_id: int
    spec: Mapping[str, Any]
    records: Sequence[Mapping[str, Any]]


class ModelChangedError(ConflictError):
    """The model was replaced after its records were checked: nothing stored."""


# What a record is checked against; settings (PATCH /v1/models/{name}) may
# change under a check without making it stale.
RECORD_SHAPE = ("task", "target", "classes", "features")


def same_record_shape(spec: Mapping[str, Any], other: Mapping[str, Any]) -> bool:
    return all(spec.get(key) == other.get(key) for key in RECORD_SHAPE)


def ingest_records(
    sessions: sessionmaker[Session] | Session, model_name: str, checked: CheckedRecords
) -> IngestResult:
    """Store ``checked`` records for ``model_name``.

    ``sessions`` is a *write* session factory, or a session the caller made
    from one; this function commits (or rolls back and re-raises) either way.
    A record whose key is already stored, or repeats an earlier key in the
    batch, counts as a duplicate and changes nothing. Raises NotFoundError, or
    ModelChangedError (409) when the model under the lock is not the one the
    records were checked against (the caller checks them again and retries).
    """
    session = sessions() if isinstance(sessions, sessionmaker) else sessions
    try:
        locked = find_model(session, model_name, lock=True)
        if locked.id != checked.model_id or not same_record_shape(locked.spec, checked.spec):
            raise ModelChangedError(
                f"Model {model_name!r} changed while its records were checked; nothing "
                "was stored. Send them again.", headers={"Retry-After": "0"})
        result = store_records(session, locked, list(checked.records))
        session.commit()
        return result
    except Exception:
        session.rollback()
        raise
    finally:
        if isinstance(sessions, sessionmaker):
            session.close()


def split_of(model_id: int, key: str | None, seq: int, holdout_fraction: float) -> str:
    """``train`` or ``holdout``, fixed by the record's key (or its sequence).

    The first 8 bytes of SHA-256 as a fraction of 2^64 are uniform on [0, 1),
    so the holdout share converges on ``holdout_fraction``; the model id in
    the hashed text makes the split differ between models sharing keys.
    """
    name = f"{model_id}:{key}" if key is not None else f"{model_id}#{seq}"
    digest = hashlib.sha256(name.encode("utf-8")).digest()
    return "holdout" if int.from_bytes(digest[:8], "big") / _SPLIT_SCALE < holdout_fraction \
        else "train"


class JSONText(str):
    """Features already in the JSON text records keep (a scored case's, read as
    stored, which is how ``store_records`` would have written them): stored
    as they are, not decoded and encoded again."""

    __slots__ = ()


def store_records(session: Session, model: ModelRow, valid: list[Mapping[str, Any]]
                  ) -> IngestResult:
    """Store checked records under the model lock ``session`` holds (no commit):
    the one way a labelled record is stored, by ingest and by accepted outcomes
    (whose features may come as JSONText)."""
    postgres = session.get_bind().dialect.name == "postgresql"
    if postgres:
        # The key lookup below runs once per batch; psycopg prepares it after
        # a few runs and PostgreSQL may then settle on a generic plan costed
        # from statistics taken when the table was small (a sequential scan
        # that grows with the table). Plan each statement for its values.
        session.execute(text("SET LOCAL plan_cache_mode = force_custom_plan"))
    fresh = _drop_duplicates(session, model.id, valid)
    if not fresh:
        return IngestResult(accepted=0, duplicates=len(valid))
    seqs = _allocate_seqs(session, model.id, len(fresh), postgres=postgres)
    fraction = float(model.spec["training"]["holdout_fraction"])
    dumps, model_id = json.dumps, model.id
    rows = [
        (seq, model_id, record.get("key"),
         features if type(features := record["features"]) is JSONText else dumps(features),
         dumps(record["label"]), split_of(model_id, record.get("key"), seq, fraction))
        for seq, record in zip(seqs, fresh, strict=True)
    ]
    holdout = sum(row[5] == "holdout" for row in rows)
    _bulk_insert(session, rows, utcnow(), postgres=postgres)
    session.execute(
        update(ModelRow)
        .where(ModelRow.id == model.id)
        .values(
            records_train=ModelRow.records_train + (len(rows) - holdout),
            records_holdout=ModelRow.records_holdout + holdout,
        )
        .execution_options(synchronize_session=False)
    )
    return IngestResult(accepted=len(rows), duplicates=len(valid) - len(rows))


def _drop_duplicates(
    session: Session, model_id: int, valid: list[Mapping[str, Any]]
) -> list[Mapping[str, Any]]:
    """The batch without keys already stored or repeated within it (first wins).

    Runs under the model lock, so no other transaction can store one of these
    keys for this model before this one commits.
    """
    keys = list(dict.fromkeys(r["key"] for r in valid if "key" in r))
    if not keys:
        return valid
    stored = {row[0] for row in rows_matching(
        session, select(RecordRow.key).where(RecordRow.model_id == model_id),
        RecordRow.key, keys)}
    fresh = []
    for record in valid:
        key = record.get("key")
        if key is not None:
            if key in stored:
                continue
            stored.add(key)  # a later repeat in this batch is a duplicate too
        fresh.append(record)
    return fresh


_COLUMNS = "seq, model_id, key, features, label, split, received_at"


def _bulk_insert(
    session: Session, rows: list[tuple[Any, ...]], received_at: dt.datetime, *, postgres: bool
) -> None:
    """Insert ``rows`` (seq, model_id, key, features JSON, label JSON, split) in
    one round trip: COPY on PostgreSQL, one executemany on SQLite.

    Rows go to the driver as plain tuples with their JSON already encoded:
    at thousands of rows per request, the ORM's per-row parameter processing
    would cost more than the database does.
    """
    connection = session.connection()
    if postgres:
        driver = connection.connection.driver_connection
        assert driver is not None  # a pooled connection in use has its driver's
        cursor = driver.cursor()
        with cursor, cursor.copy(f"COPY records ({_COLUMNS}) FROM STDIN") as copy:
            for row in rows:
                copy.write_row((*row, received_at))
        return
    # SQLite stores datetimes as text; let the column type spell it once.
    dialect = connection.dialect
    process = RecordRow.__table__.c.received_at.type.dialect_impl(dialect).bind_processor(dialect)
    stamp = process(received_at) if process else received_at
    connection.exec_driver_sql(
        f"INSERT INTO records ({_COLUMNS}) VALUES (?, ?, ?, ?, ?, ?, ?)",
        [(*row, stamp) for row in rows],
    )


def _allocate_seqs(session: Session, model_id: int, count: int, *, postgres: bool
                   ) -> list[int]:
    """``count`` increasing sequence numbers, taken while the model lock is held."""
    if postgres:
        seqs = session.scalars(
            text("SELECT nextval(pg_get_serial_sequence('records', 'seq')) "
                 "FROM generate_series(1, :n)"),
            {"n": count},
        ).all()
        return sorted(seqs)
    # SQLite: the write transaction holds the database lock, so max + 1 is ours;
    # never at or below a sequence this model had before a forget removed it
    # (its trainer and versions may have passed it: a number handed out again
    # would sit behind their cursors, never learned). One statement.
    top = session.scalar(select(func.max(
        func.coalesce(select(func.max(RecordRow.seq)).scalar_subquery(), 0),
        func.coalesce(select(func.max(ModelEventRow.at_seq)).where(
            ModelEventRow.model_id == model_id,
            ModelEventRow.kind == RECORDS_FORGOTTEN).scalar_subquery(), 0)))) or 0
    return list(range(top + 1, top + 1 + count))
