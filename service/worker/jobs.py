"""Job row transitions other than success (see versions.py for that one).

Each write checks that this worker still holds the job, so a worker that lost
its lease (and whose job another worker picked up) changes nothing.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import case, update
from sqlalchemy.orm import Session, sessionmaker

from service.store.database import transaction
from service.store.tables import JobRow, utcnow
from service.worker.leasing import MAX_JOB_ATTEMPTS


def _held(job_id: int, worker_id: str) -> Any:
    return (JobRow.id == job_id) & (JobRow.leased_by == worker_id) & (JobRow.status == "running")


def report_progress(
    sessions: sessionmaker[Session], job_id: int, worker_id: str, progress: dict[str, Any]
) -> bool:
    """Store the job's progress; False when this worker no longer holds it."""
    with transaction(sessions) as session:
        result = session.execute(
            update(JobRow).where(_held(job_id, worker_id)).values(progress=progress)
        )
        return bool(result.rowcount)  # type: ignore[attr-defined]


def fail_job(sessions: sessionmaker[Session], job_id: int, worker_id: str, error: str) -> None:
    """The job failed for good: record why."""
    with transaction(sessions) as session:
        session.execute(
            update(JobRow)
            .where(_held(job_id, worker_id))
            .values(status="failed", error=error, finished_at=utcnow(),
                    leased_by=None, lease_expires_at=None)
        )


def requeue_job(sessions: sessionmaker[Session], job_id: int, worker_id: str) -> None:
    """This worker is stopping: hand the job back so another can run it now
    instead of after the lease expires."""
    with transaction(sessions) as session:
        session.execute(
            update(JobRow)
            .where(_held(job_id, worker_id))
            .values(status="queued", leased_by=None, lease_expires_at=None,
                    attempts=JobRow.attempts - 1)
        )


def retry_job(sessions: sessionmaker[Session], job_id: int, worker_id: str, error: str) -> None:
    """A database error (a deadlock, a lost connection) cut this attempt short:
    queue the job again with the attempt counted and the error shown; the
    attempt that reaches ``MAX_JOB_ATTEMPTS`` fails the job with it."""
    last = JobRow.attempts >= MAX_JOB_ATTEMPTS
    with transaction(sessions) as session:
        session.execute(
            update(JobRow)
            .where(_held(job_id, worker_id))
            .values(status=case((last, "failed"), else_="queued"),
                    finished_at=case((last, utcnow()), else_=None),
                    error=error, leased_by=None, lease_expires_at=None)
        )
