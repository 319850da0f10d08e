"""Row leases: how workers divide models and jobs between them.

A lease is two columns on the leased row (``leased_by``, ``lease_expires_at``).
Claiming selects free rows ``FOR UPDATE SKIP LOCKED`` (PostgreSQL), so workers
racing for the same rows each get different ones without waiting; on SQLite
the write session's ``BEGIN IMMEDIATE`` serialises claims instead. A holder
renews its leases with a heartbeat; a row whose lease has expired is free again,
which is how a dead worker's models and jobs pass to another.

A lease alone does not make a writer safe (a stalled holder may wake up after
its lease passed on): every write a holder makes re-checks ``leased_by`` in
its own transaction (see versions.py), which fences a stale holder out.

Times are the workers' clocks (UTC); workers on several hosts need them
synchronised to well within a lease.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable

from sqlalchemy import BigInteger, DateTime, exists, literal, or_, select, update
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session

from service.store.tables import JobRow, ModelRow, RecordRow, TrainerRow, utcnow

# A job whose worker vanished this many times is failed instead of retried:
# it is likely what brings its workers down.
MAX_JOB_ATTEMPTS = 3


def ensure_trainer_rows(session: Session) -> None:
    """Give every model a trainer row (models made before the row existed, or
    by a path that did not add one); concurrent callers do not conflict."""
    missing = select(ModelRow.id).where(~ModelRow.id.in_(select(TrainerRow.model_id)))
    if not session.execute(missing.limit(1)).first():
        return
    dialect = postgresql if session.get_bind().dialect.name == "postgresql" else sqlite
    now = utcnow()
    rows = select(ModelRow.id, literal(0, BigInteger), literal(now, DateTime(timezone=True))).where(
        ~ModelRow.id.in_(select(TrainerRow.model_id))
    )
    statement = (
        dialect.insert(TrainerRow)
        .from_select(["model_id", "cursor", "updated_at"], rows)
        .on_conflict_do_nothing(index_elements=["model_id"])
    )
    session.execute(statement)


def claim_trainers(
    session: Session,
    worker_id: str,
    lease_seconds: float,
    limit: int,
    exclude: Iterable[int] = (),
) -> list[int]:
    """Lease up to ``limit`` free, unstopped trainers with records after their
    cursor to ``worker_id`` (its own leases count as free, except the models
    in ``exclude``), leaving out the models backed off until later (faults.py)
    and the paused ones; returns their model ids. Call inside a write
    transaction.

    A model with nothing to learn is not leased: workers let caught-up models
    go (``KEELSON_WORKER_RELEASE_SECONDS``), and taking one back before it has
    records would load it for nothing. The test is one probe of the
    (model_id, seq) index per free trainer."""
    if limit <= 0:
        return []
    now = utcnow()
    lagging = exists().where(RecordRow.model_id == TrainerRow.model_id,
                             RecordRow.seq > TrainerRow.cursor)
    free = (
        select(TrainerRow.model_id)
        .where(
            TrainerRow.error.is_(None),
            TrainerRow.paused_at.is_(None),
            or_(TrainerRow.retry_at.is_(None), TrainerRow.retry_at <= now),
            TrainerRow.model_id.not_in(list(exclude)),
            or_(
                TrainerRow.leased_by.is_(None),
                TrainerRow.leased_by == worker_id,
                TrainerRow.lease_expires_at < now,
            ),
            lagging,
        )
        .order_by(TrainerRow.model_id)
        .limit(limit)
        .with_for_update(skip_locked=True)
    )
    model_ids = list(session.scalars(free))
    if model_ids:
        session.execute(
            update(TrainerRow)
            .where(TrainerRow.model_id.in_(model_ids))
            .values(leased_by=worker_id, lease_expires_at=_expiry(now, lease_seconds))
        )
    return model_ids


def renew_trainers(
    session: Session, worker_id: str, model_ids: Iterable[int], lease_seconds: float
) -> dict[int, int | None]:
    """Extend this worker's leases; returns {model id: head version id} for the
    ones it still holds (a lease another worker took over is not renewed, nor
    one of a model paused since: its worker lets it go at the next chunk)."""
    ids = list(model_ids)
    if not ids:
        return {}
    result = session.execute(
        update(TrainerRow)
        .where(
            TrainerRow.model_id.in_(ids),
            TrainerRow.leased_by == worker_id,
            TrainerRow.error.is_(None),
            TrainerRow.paused_at.is_(None),
        )
        .values(lease_expires_at=_expiry(utcnow(), lease_seconds))
        .returning(TrainerRow.model_id, TrainerRow.head_version_id)
    )
    return {model_id: head for model_id, head in result}


def release_trainers(session: Session, worker_id: str, model_ids: Iterable[int]) -> None:
    """Give up leases so another worker can take the models at once."""
    ids = list(model_ids)
    if ids:
        session.execute(
            update(TrainerRow)
            .where(TrainerRow.model_id.in_(ids), TrainerRow.leased_by == worker_id)
            .values(leased_by=None, lease_expires_at=None)
        )


def claim_job(session: Session, worker_id: str, lease_seconds: float) -> JobRow | None:
    """Lease the oldest queued job, or a running one whose worker's lease ran
    out; marks it running. Call inside a write transaction."""
    now = utcnow()
    while True:
        job = session.execute(
            select(JobRow)
            .where(
                or_(
                    JobRow.status == "queued",
                    (JobRow.status == "running") & (JobRow.lease_expires_at < now),
                )
            )
            .order_by(JobRow.id)
            .limit(1)
            .with_for_update(skip_locked=True)
        ).scalar_one_or_none()
        if job is None:
            return None
        if job.status == "running" and job.attempts >= MAX_JOB_ATTEMPTS:
            job.status = "failed"
            job.error = f"its worker stopped responding {job.attempts} times; not retried"
            job.finished_at = now
            job.leased_by = job.lease_expires_at = None
            session.flush()
            continue
        job.status = "running"
        job.leased_by = worker_id
        job.lease_expires_at = _expiry(now, lease_seconds)
        job.attempts = (job.attempts or 0) + 1
        job.started_at = now
        job.progress = None
        session.flush()
        return job


def renew_job(session: Session, worker_id: str, job_id: int, lease_seconds: float) -> bool:
    """Extend a running job's lease; False when this worker no longer holds it."""
    result = session.execute(
        update(JobRow)
        .where(JobRow.id == job_id, JobRow.leased_by == worker_id, JobRow.status == "running")
        .values(lease_expires_at=_expiry(utcnow(), lease_seconds))
        .returning(JobRow.id)
    )
    return result.first() is not None


def _expiry(now: dt.datetime, lease_seconds: float) -> dt.datetime:
    return now + dt.timedelta(seconds=lease_seconds)
