"""Delete jobs: removing a deleted model's rows, a batch per transaction.

The request (service/usecases/deletion.py) already made the model unreachable;
this job removes what it kept, dependents first: its other jobs, drift
tallies, track record, scored cases, records, and last its versions (which
the others point at). Each batch is its own short transaction (two
statements: find the ids, delete them), so the database's write lock
(SQLite) or the rows' locks (PostgreSQL) are held for milliseconds and other
models' requests go on between batches.

Every step only deletes what is still there, so running the job again after
a worker died part-way (its lease runs out and another worker claims it)
finishes the work; the model's tombstone row and its delete job stay, so the
job can still be read (GET /v1/jobs/{id}).
"""

from __future__ import annotations

import datetime as dt
import logging
import time
from collections.abc import Callable
from typing import Any

from sqlalchemy import delete, func, select, text, update
from sqlalchemy.orm import InstrumentedAttribute, Session, sessionmaker

from engine import TrainingCancelled
from service.store.database import transaction
from service.store.tables import (
    DriftTallyRow,
    JobRow,
    ModelEventRow,
    ModelRow,
    RecordRow,
    ScoredCaseRow,
    TrackRecordAlarmRow,
    TrackRecordDayRow,
    VersionRow,
    utcnow,
)
from service.usecases.common import as_utc
from service.versions.writes import Fenced
from service.worker.jobs import report_progress
from service.worker.settings import WorkerSettings

log = logging.getLogger("keelson.worker")

# API processes may serve a model from their cache for up to this long after
# it was deleted (service/versions/cache.py promises at most 1 s), and so
# still store a scored case for it: the removing starts once that has passed.
SERVING_STALE_SECONDS = 1.0

# Rows per transaction come from KEELSON_WORKER_DELETE_BATCH (a few thousand
# records take milliseconds to delete on either database); versions hold
# snapshots (up to megabytes each), so at most this many of them.
VERSION_BATCH = 50

# A batch's transaction is kept under about this long (see _next_size), down
# to MIN_BATCH rows; the job rests at least MIN_REST_SECONDS after
# each batch.
HOLD_TARGET_SECONDS = 0.002
MIN_BATCH = 20
MIN_REST_SECONDS = 0.005

# What is removed, in order (dependents before the versions they point at):
# (progress name, primary key column, model id column, whether rows are big).
STEPS: tuple[tuple[str, InstrumentedAttribute[Any], InstrumentedAttribute[Any], bool], ...] = (
    ("drift_tallies", DriftTallyRow.id, DriftTallyRow.model_id, False),
    ("track_record_alarms", TrackRecordAlarmRow.version_id, TrackRecordAlarmRow.model_id, False),
    ("track_record_days", TrackRecordDayRow.id, TrackRecordDayRow.model_id, False),
    ("scored_cases", ScoredCaseRow.id, ScoredCaseRow.model_id, False),
    ("model_events", ModelEventRow.id, ModelEventRow.model_id, False),
    ("records", RecordRow.seq, RecordRow.model_id, False),
    ("versions", VersionRow.id, VersionRow.model_id, True),
)


def run_delete(settings: WorkerSettings, reads: sessionmaker[Session],
               writes: sessionmaker[Session], job_id: int, worker_id: str,
               cancel: Callable[[], bool]) -> dict[str, Any]:
    """Remove the rows of the job's model; the job ends succeeded with what was
    removed as its progress. TrainingCancelled when ``cancel`` says so (the job
    is handed back), Fenced when the job passed to another worker."""
    with transaction(writes) as session:
        job = session.get(JobRow, job_id)
        if job is None:
            raise Fenced(f"job {job_id} is gone")
        model_id = job.model_id
        model = session.get(ModelRow, model_id)
        if model is None or model.deleted_name is None:
            raise Fenced(f"model {model_id} of delete job {job_id} is not being deleted")
        total = model.records_train + model.records_holdout
        accepted = as_utc(job.created_at) or utcnow()
        # Its other jobs go first, in one statement (there are few): a retrain
        # still running loses its row, so its lease renewal fails and it stops.
        session.execute(delete(JobRow).where(JobRow.model_id == model_id, JobRow.id != job_id))
    _wait_until(accepted + dt.timedelta(seconds=SERVING_STALE_SECONDS), cancel)
    with reads() as session:  # counted outside the write lock
        left = session.scalar(select(func.count()).select_from(RecordRow)
                              .where(RecordRow.model_id == model_id)) or 0
    progress: dict[str, Any] = {"step": None, "records_total": total,
                                "records_deleted": total - left, "deleted": {}}
    reported = time.monotonic()
    # SQLite has one write lock: a writer that found it taken sleeps in its
    # busy handler (1, 2, 5, 10 ms... between tries) and would find the next
    # batch holding it again. Resting as long as each batch took (at least
    # MIN_REST) leaves the lock free at least half the time, long enough for
    # a waiter's next try, so other models' writes get in. PostgreSQL locks
    # rows, not the database, but a delete running flat out takes the CPU and
    # the WAL from other models' commits (p99 3.8x measured on 2 cores); the
    # same pacing keeps it a background job there too.
    after = 0  # records: the seq the next batch starts after
    for name, key, owner, big in STEPS:
        limit = min(settings.delete_batch, VERSION_BATCH) if big else settings.delete_batch
        size = limit
        progress["step"] = name
        removed = 0
        while True:
            if cancel():
                raise TrainingCancelled(f"delete job {job_id} was stopped")
            began = time.monotonic()
            if key is RecordRow.seq:
                count, after = _delete_records(reads, writes, model_id, size, after)
            else:
                count = _delete_batch(writes, key, owner, model_id, size)
            took = time.monotonic() - began
            time.sleep(max(took, MIN_REST_SECONDS))
            removed += count
            # A short batch was the last of this kind; otherwise the next is
            # time-boxed by this one's hold.
            size = 0 if count < size else _next_size(size, limit, took)
            if name == "records":
                progress["records_deleted"] += count
            if size == 0:
                break
            if time.monotonic() - reported >= settings.progress_seconds:
                progress["deleted"][name] = removed
                if not report_progress(writes, job_id, worker_id, progress):
                    raise Fenced(f"job {job_id} is no longer held by {worker_id}")
                reported = time.monotonic()
        progress["deleted"][name] = removed
    progress["step"] = "done"
    _finish(writes, job_id, worker_id, progress)
    log.info("job %s: model %s deleted (%s)", job_id, model_id, progress["deleted"])
    return progress


def _next_size(size: int, limit: int, took: float) -> int:
    """Time-boxed batches: halve a batch that held its transaction longer
    than HOLD_TARGET_SECONDS (a slow disk, big rows, a busy machine), grow it
    back towards ``limit`` while batches take under half of that."""
    if took > HOLD_TARGET_SECONDS:
        return max(MIN_BATCH, size // 2)
    if took < HOLD_TARGET_SECONDS / 2:
        return min(limit, size * 2)
    return size


def _wait_until(moment: dt.datetime, cancel: Callable[[], bool]) -> None:
    while (left := (moment - utcnow()).total_seconds()) > 0:
        if cancel():
            raise TrainingCancelled("the delete job was stopped")
        time.sleep(min(0.1, left))


def _delete_records(reads: sessionmaker[Session], writes: sessionmaker[Session],
                    model_id: int, size: int, after: int) -> tuple[int, int]:
    """The model's ``size`` oldest records after seq ``after`` (those up to it
    are gone already), as one range of its (model_id, seq) index; how many
    went, and the seq to continue after.

    The range's end is found before the write transaction (no record of a
    deleted model is added any more), so the write holds its lock for one
    DELETE with bounds: against a list of ``size`` ids, the batch held
    SQLite's write lock 3 to 5 times as long. Both bounds are given: the index
    scan starts past what earlier batches deleted (on PostgreSQL their dead
    entries stay until vacuum), and the planner, whose statistics still see
    the deleted rows, estimates one batch, not the whole table."""
    with reads() as session:
        last = session.scalar(select(RecordRow.seq).where(
            RecordRow.model_id == model_id, RecordRow.seq > after)
            .order_by(RecordRow.seq).offset(size - 1).limit(1))
    with transaction(writes) as session:
        _without_flush_wait(session)
        query = delete(RecordRow).where(RecordRow.model_id == model_id, RecordRow.seq > after)
        if last is not None:  # else fewer than ``size`` are left: all of them
            query = query.where(RecordRow.seq <= last)
        result = session.execute(query.execution_options(synchronize_session=False))
        return int(result.rowcount), after if last is None else int(last)  # type: ignore[attr-defined]


def _delete_batch(writes: sessionmaker[Session], key: InstrumentedAttribute[Any],
                  owner: InstrumentedAttribute[Any], model_id: int, size: int) -> int:
    with transaction(writes) as session:
        _without_flush_wait(session)
        # Two statements: PostgreSQL may run a LIMIT subquery inside a DELETE
        # more than once, deleting more than a batch (as retention.py does).
        # Records go oldest first (their (model_id, seq) index gives that
        # order for free); the other tables in whatever order their index has.
        query = select(key).where(owner == model_id).limit(size)
        if key is RecordRow.seq:
            query = query.order_by(key)
        found = list(session.scalars(query))
        if not found:
            return 0
        result = session.execute(delete(key.class_).where(owner == model_id, key.in_(found))
                                 .execution_options(synchronize_session=False))
        return int(result.rowcount)  # type: ignore[attr-defined]


def _without_flush_wait(session: Session) -> None:
    """On PostgreSQL, commit this batch without waiting for its WAL to reach
    the disk (``synchronous_commit = off`` for this transaction only). A batch
    lost in a crash comes back as rows the next run deletes again (every step
    deletes what is still there); meanwhile other models' commits no longer
    queue behind a flush per batch of ours. SQLite: nothing."""
    if session.get_bind().dialect.name == "postgresql":
        session.execute(text("SET LOCAL synchronous_commit = off"))


def _finish(writes: sessionmaker[Session], job_id: int, worker_id: str,
            progress: dict[str, Any]) -> None:
    with transaction(writes) as session:
        result = session.execute(
            update(JobRow)
            .where(JobRow.id == job_id, JobRow.leased_by == worker_id,
                   JobRow.status == "running")
            .values(status="succeeded", error=None, progress=progress,
                    finished_at=utcnow(), leased_by=None, lease_expires_at=None))
        if not result.rowcount:  # type: ignore[attr-defined]
            raise Fenced(f"job {job_id} is no longer held by {worker_id}")
