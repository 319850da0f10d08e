"""The worker's retention pass: what grows with time and is no longer needed
goes, a batch per short transaction, a few batches per call so the worker's
loop (online learning, jobs, leases) goes on between calls.

* scored cases without an outcome (retention.py, KEELSON_CASE_RETENTION_DAYS);
* snapshots of old versions never active (snapshot_retention.py,
  KEELSON_SNAPSHOT_RETENTION_DAYS, KEELSON_SNAPSHOT_KEEP_LAST);
* drift tallies of hours older than KEELSON_DRIFT_TALLY_RETENTION_DAYS (here);
* the rows deleted models leave (a tombstone ``models`` row and its delete
  job, kept so the job stays readable) once that job finished more than
  KEELSON_TOMBSTONE_RETENTION_DAYS ago (here).
"""

from __future__ import annotations

import datetime as dt
import logging
from dataclasses import dataclass

from sqlalchemy import delete, select
from sqlalchemy.orm import Session, sessionmaker

from service.store.database import transaction
from service.store.tables import DriftTallyRow, JobRow, ModelRow, utcnow
from service.usecases.deletion import DELETE_JOB
from service.worker.retention import purge_expired_cases
from service.worker.settings import WorkerSettings
from service.worker.snapshot_retention import prune_snapshots

log = logging.getLogger("keelson.worker")

TALLY_BATCH = 1_000  # drift tally rows deleted per transaction
TOMBSTONE_BATCH = 20  # deleted models removed per transaction
MAX_BATCHES = 10  # per kind and call


@dataclass
class Removed:
    """What one pass removed, and whether more may remain (call again soon)."""

    cases: int = 0
    snapshots: int = 0
    tallies: int = 0
    tombstones: int = 0
    more: bool = False


def retention_pass(settings: WorkerSettings, writes: sessionmaker[Session],
                   reads: sessionmaker[Session], *, now: dt.datetime | None = None,
                   max_batches: int = MAX_BATCHES) -> Removed:
    """One pass over every kind; each does at most ``max_batches`` batches."""
    now = now or utcnow()
    done = Removed()
    done.cases, more_cases = purge_expired_cases(
        writes, reads, settings.case_retention_days, now=now, max_batches=max_batches)
    done.snapshots, more_snapshots = prune_snapshots(
        writes, reads, settings.snapshot_retention_days, settings.snapshot_keep_last,
        now=now, max_batches=max_batches)
    done.tallies, more_tallies = purge_drift_tallies(
        writes, reads, settings.drift_tally_retention_days, now=now, max_batches=max_batches)
    done.tombstones, more_tombstones = purge_tombstones(
        writes, reads, settings.tombstone_retention_days, now=now, max_batches=max_batches)
    done.more = more_cases or more_snapshots or more_tallies or more_tombstones
    return done


def purge_drift_tallies(writes: sessionmaker[Session], reads: sessionmaker[Session],
                        retention_days: float, *, now: dt.datetime | None = None,
                        max_batches: int = MAX_BATCHES) -> tuple[int, bool]:
    """Delete tallies of hours older than ``retention_days`` (by the
    bucket_start index). No process writes them any more: a process writes
    only the hour it is in."""
    cutoff = (now or utcnow()) - dt.timedelta(days=retention_days)
    deleted = 0
    for _ in range(max_batches):
        with reads() as session:
            found = list(session.scalars(select(DriftTallyRow.id).where(
                DriftTallyRow.bucket_start < cutoff).limit(TALLY_BATCH)))
        if found:
            with transaction(writes) as session:
                result = session.execute(delete(DriftTallyRow).where(
                    DriftTallyRow.id.in_(found), DriftTallyRow.bucket_start < cutoff,
                ).execution_options(synchronize_session=False))
                deleted += int(result.rowcount)  # type: ignore[attr-defined]
        if len(found) < TALLY_BATCH:
            return deleted, False
    return deleted, True


def purge_tombstones(writes: sessionmaker[Session], reads: sessionmaker[Session],
                     retention_days: float, *, now: dt.datetime | None = None,
                     max_batches: int = MAX_BATCHES) -> tuple[int, bool]:
    """Remove deleted models whose delete job succeeded more than
    ``retention_days`` ago: the job row, then the model row (its delete job
    already removed everything else it had). A failed or unfinished delete
    keeps its tombstone: it still has work to do, or a failure to show."""
    cutoff = (now or utcnow()) - dt.timedelta(days=retention_days)
    finished = (select(JobRow.model_id).where(
        JobRow.kind == DELETE_JOB, JobRow.status == "succeeded", JobRow.finished_at < cutoff))
    removed = 0
    for _ in range(max_batches):
        with reads() as session:
            found = list(session.scalars(select(ModelRow.id).where(
                ModelRow.deleted_name.is_not(None), ModelRow.id.in_(finished))
                .order_by(ModelRow.id).limit(TOMBSTONE_BATCH)))
        if found:
            with transaction(writes) as session:
                session.execute(delete(JobRow).where(JobRow.model_id.in_(found))
                                .execution_options(synchronize_session=False))
                result = session.execute(delete(ModelRow).where(
                    ModelRow.id.in_(found), ModelRow.deleted_name.is_not(None))
                    .execution_options(synchronize_session=False))
                removed += int(result.rowcount)  # type: ignore[attr-defined]
        if len(found) < TOMBSTONE_BATCH:
            return removed, False
    return removed, True
