"""Use case: forget records by key (POST /v1/models/{name}/records/forget).

One write transaction removes, for each key, the model's record and its
scored case (with its outcome), takes the forgotten outcomes out of the live
metrics' day sums, marks every version trained on a forgotten train record,
fences the workers that may hold one in memory, optionally queues a retrain
from scratch, and writes the act in the model's history (keys SHA-256
hashed). A SIGKILL at any instant leaves all of it or none of it.

Which versions were trained on a record: every version whose cursor is at or
past the record's sequence, when the record is a train record. A version's
weights hold every train record up to its cursor that existed when it was
made: an online version learned them itself or through its parent (the
lineage starts at the first record or at a retrain's cursor); a retrain read
every train record up to its cursor. A record that still exists existed
then (sequence numbers only grow). Versions written later inherit their
parent's count (service/versions/writes.py): the online lineage goes on from
a head that learned them; only a retrain from scratch is free of them.

Locks, in the order every writer takes them (docs/architecture.md, "Locking
order"): the model's running retrain jobs (their version write holds the job
row first), the model row, the trainer row (held by a version write while it
writes, so every version this transaction does not see is written after it,
and is fenced: the trainer's lease is dropped here, the running jobs are
queued again, so the next run reads the records without the forgotten ones),
then the scored cases in key order.
"""

from __future__ import annotations

import bisect
import hashlib
from collections.abc import Sequence
from typing import Any

from sqlalchemy import Table, any_, bindparam, delete, select, update
from sqlalchemy.dialects.postgresql import ARRAY, BIGINT
from sqlalchemy.orm import Session

from service.store.database import Database, transaction
from service.store.model_events import RECORDS_FORGOTTEN, RETRAIN_REQUESTED, add_event, last_seq
from service.store.tables import (
    JobRow,
    ModelRow,
    RecordRow,
    ScoredCaseRow,
    TrainerRow,
    VersionRow,
)
from service.store.value_lists import SQLITE_CHUNK, rows_matching
from service.usecases.cases import find_cases
from service.usecases.common import find_model
from service.usecases.forget_outcomes import take_out_outcomes
from service.usecases.jobs import job_view

MAX_FORGET_KEYS = 10_000  # keys per request: one transaction stays short
SHOWN = 100  # absent keys and marked versions an answer names (all are counted)


def key_hash(key: str) -> str:
    """What the history keeps of a forgotten key: its SHA-256, hex. Anyone
    holding the key can check it was forgotten; the history does not hold it."""
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def forget_records(db: Database, name: str, keys: Sequence[str], *, token: str | None,
                   reason: str | None, retrain: bool) -> dict[str, Any]:
    """Forget the records and scored cases of ``model`` named by ``keys``
    (at most MAX_FORGET_KEYS, checked by the caller). Keys found nowhere
    (never stored, or forgotten before) are counted as absent: forgetting
    them again changes nothing, records nothing and queues nothing."""
    wanted = list(dict.fromkeys(keys))
    with transaction(db.write) as session:
        model_id = find_model(session, name).id
        jobs = _lock_running_retrains(session, model_id)
        model = find_model(session, name, lock=True)
        trainer = session.execute(
            select(TrainerRow).where(TrainerRow.model_id == model.id).with_for_update()
            .execution_options(populate_existing=True)).scalar_one_or_none()
        records = _find_records(session, model.id, wanted)
        cases = find_cases(session, model.id, wanted, ScoredCaseRow.id, ScoredCaseRow.version_id,
                           ScoredCaseRow.output, ScoredCaseRow.outcome,
                           ScoredCaseRow.outcome_at, ScoredCaseRow.scored_at, lock=True)
        found = {row.key for row in records} | {row.key for row in cases}
        absent = [key for key in wanted if key not in found]
        if not found:
            return _answer(name, wanted, absent, None)
        at_seq = last_seq(session, model.id)  # before anything is removed
        train_seqs = sorted(row.seq for row in records if row.split == "train")
        marked = _mark_versions(session, model.id, train_seqs)
        outcomes = take_out_outcomes(session, model, [
            row for row in cases if row.outcome is not None and row.version_id is not None])
        _delete(session, ScoredCaseRow.id, [row.id for row in cases])
        _delete(session, RecordRow.seq, [row.seq for row in records])
        holdout = len(records) - len(train_seqs)
        session.execute(update(ModelRow).where(ModelRow.id == model.id).values(
            records_train=ModelRow.records_train - len(train_seqs),
            records_holdout=ModelRow.records_holdout - holdout,
        ).execution_options(synchronize_session=False))
        if records:
            _fence(trainer, jobs)
        removed = {"records": len(records), "train": len(train_seqs), "holdout": holdout,
                   "cases": len(cases),
                   "outcomes": sum(row.outcome is not None for row in cases),
                   "track_record_outcomes": outcomes}
        active = _active(session, model, marked)
        job = _queue_retrain(session, model.id) if retrain else None
        act = {"removed": removed, "marked": marked, "active": active,
               "retrain": None if job is None else job.id}
        details = {**_summary(wanted, absent, act), "keys_sha256": sorted(
            key_hash(key) for key in found)}
        event = add_event(session, model.id, RECORDS_FORGOTTEN, token=token, reason=reason,
                          at_seq=at_seq, details=details)
        if job is not None:
            add_event(session, model.id, RETRAIN_REQUESTED, token=token, reason=reason,
                      details={"job": job.id, "warm_start": False, "forget": True})
        session.flush()
        answer = _answer(name, wanted, absent, act)
        answer["event"] = event.id
        answer["retrain"] = None if job is None else job_view(job, name, None)
        return answer


def _lock_running_retrains(session: Session, model_id: int) -> list[JobRow]:
    """The model's running retrains, locked (before the model row, as their
    version write takes them): each may have read a record about to go."""
    return list(session.scalars(
        select(JobRow).where(JobRow.model_id == model_id, JobRow.kind == "retrain",
                             JobRow.status == "running")
        .order_by(JobRow.id).with_for_update().execution_options(populate_existing=True)))


def _find_records(session: Session, model_id: int, keys: list[str]) -> list[Any]:
    """(seq, key, split) of the model's records named by ``keys``."""
    return rows_matching(session, select(RecordRow.seq, RecordRow.key, RecordRow.split)
                         .where(RecordRow.model_id == model_id), RecordRow.key, keys)


def _mark_versions(session: Session, model_id: int, train_seqs: list[int]
                   ) -> list[dict[str, Any]]:
    """Add to each version the forgotten train records at or before its
    cursor; returns {number, status, records} of each version marked."""
    if not train_seqs:
        return []
    rows = session.execute(
        select(VersionRow.id, VersionRow.number, VersionRow.status, VersionRow.cursor)
        .where(VersionRow.model_id == model_id, VersionRow.cursor >= train_seqs[0])
        .order_by(VersionRow.number)).all()
    marked, changes = [], []
    for row in rows:
        count = bisect.bisect_right(train_seqs, row.cursor)
        marked.append({"number": row.number, "status": row.status, "records": count})
        changes.append({"version_id": row.id, "count": count})
    if changes:
        table: Table = VersionRow.__table__  # type: ignore[assignment]  # Core: one executemany
        session.connection().execute(
            update(table).where(table.c.id == bindparam("version_id")).values(
                forgotten_records=table.c.forgotten_records + bindparam("count")), changes)
    return marked


def _delete(session: Session, column: Any, values: list[int]) -> None:
    if not values:
        return
    table = column.class_
    if session.get_bind().dialect.name == "postgresql":
        session.execute(delete(table).where(column == any_(
            bindparam("values", values, type_=ARRAY(BIGINT)))))
        return
    for start in range(0, len(values), SQLITE_CHUNK):
        session.execute(delete(table).where(column.in_(values[start:start + SQLITE_CHUNK])))


def _fence(trainer: TrainerRow | None, jobs: list[JobRow]) -> None:
    """Whoever holds records in memory starts again from what is stored: the
    online trainer's lease is dropped (its next write is refused and it
    reloads its head, then reads the records after the head's cursor, without
    the forgotten ones); a running retrain is queued again (its attempt not
    counted) and reads them anew."""
    if trainer is not None and trainer.leased_by is not None:
        trainer.leased_by, trainer.lease_expires_at = None, None
    for job in jobs:
        job.status, job.leased_by, job.lease_expires_at = "queued", None, None
        job.attempts, job.progress = max(0, (job.attempts or 0) - 1), None


def _active(session: Session, model: ModelRow, marked: list[dict[str, Any]]
            ) -> dict[str, Any] | None:
    """The serving version and what it learned of these records (None: none serves)."""
    if model.active_version_id is None:
        return None
    number = session.scalar(select(VersionRow.number).where(
        VersionRow.id == model.active_version_id))
    records = next((m["records"] for m in marked if m["number"] == number), 0)
    return {"version": number, "records": records}


def _queue_retrain(session: Session, model_id: int) -> JobRow:
    """A retrain from scratch: it reads the train records that are left."""
    job = JobRow(model_id=model_id, kind="retrain", status="queued",
                 params={"warm_start": False}, attempts=0)
    session.add(job)
    session.flush()
    return job


def _summary(wanted: list[str], absent: list[str], act: dict[str, Any]) -> dict[str, Any]:
    marked = act["marked"]
    return {
        "keys": len(wanted), "forgotten": len(wanted) - len(absent), "absent": len(absent),
        "removed": act["removed"],
        "versions_marked": len(marked),
        "versions": ({"first": marked[0]["number"], "last": marked[-1]["number"]}
                     if marked else None),
        "active": act["active"],
        "retrain_job": act["retrain"],
        "message": message(act),
    }


def message(act: dict[str, Any] | None) -> str:
    """What the act means for serving, plainly (in the answer and the history)."""
    if act is None:
        return "None of these keys is stored: nothing was changed."
    active, parts = act["active"], []
    if active is None:
        parts.append("No version is active.")
    elif active["records"]:
        parts.append(
            f"Version {active['version']}, active, was trained on {active['records']} of "
            "these records and keeps serving until another version is promoted.")
    else:
        parts.append(f"Version {active['version']}, active, was not trained on these "
                     "records.")
    if act["retrain"] is not None:
        parts.append(f"Retrain job {act['retrain']} trains a version from scratch without "
                     "them; it serves once it is promoted.")
    elif act["marked"]:
        parts.append("Ask for a retrain (?retrain=true, or POST .../retrain) to train a "
                     "version without them.")
    return " ".join(parts)


def _answer(name: str, wanted: list[str], absent: list[str], act: dict[str, Any] | None
            ) -> dict[str, Any]:
    empty = {"records": 0, "train": 0, "holdout": 0, "cases": 0, "outcomes": 0,
             "track_record_outcomes": 0}
    return {
        "model": name,
        "keys": len(wanted),
        "forgotten": len(wanted) - len(absent),
        "absent": len(absent),
        "absent_keys": absent[:SHOWN],
        "removed": empty if act is None else act["removed"],
        "versions_marked": [] if act is None else act["marked"][:SHOWN],
        "versions_marked_count": 0 if act is None else len(act["marked"]),
        "active": None if act is None else act["active"],
        "message": message(act),
        "event": None,
        "retrain": None,
    }
