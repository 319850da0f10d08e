"""Use cases for jobs: queue a retrain, show a job."""

from __future__ import annotations

from collections.abc import Collection
from typing import Any

from sqlalchemy import func, select

from service.errors import ConflictError, NotFoundError
from service.store.database import Database, transaction
from service.store.model_events import RETRAIN_REQUESTED, add_event
from service.store.tables import JobRow, ModelRow, VersionRow
from service.usecases.common import as_utc, find_model


def job_view(job: JobRow, model_name: str, version_number: int | None) -> dict[str, Any]:
    return {
        "id": job.id,
        "model": model_name,
        "kind": job.kind,
        "status": job.status,
        "progress": job.progress,
        "version": version_number,
        "error": job.error,
        "created_at": as_utc(job.created_at),
        "started_at": as_utc(job.started_at),
        "finished_at": as_utc(job.finished_at),
    }


def request_retrain(db: Database, name: str, *, warm_start: bool, token: str | None = None,
                    reason: str | None = None) -> dict[str, Any]:
    """Queue a full retrain for a worker. A warm start continues from the
    active version, so it needs one (ConflictError otherwise)."""
    with transaction(db.write) as session:
        model = find_model(session, name)
        if warm_start and model.active_version_id is None:
            raise ConflictError(f"Model {name!r} has no active version to warm-start from.")
        job = JobRow(model_id=model.id, kind="retrain", status="queued",
                     params={"warm_start": warm_start}, attempts=0)
        session.add(job)
        session.flush()
        add_event(session, model.id, RETRAIN_REQUESTED, token=token, reason=reason,
                  details={"job": job.id, "warm_start": warm_start})
    return job_view(job, model.name, None)


def get_job(db: Database, job_id: int, *, only: Collection[str] | None = None
            ) -> dict[str, Any]:
    """One job; a job of a model outside ``only`` (a token limited to models)
    is not there, word for word as a job that does not exist."""
    with db.read() as session:
        row = session.execute(
            # A deleted model's jobs show the name it had (see deletion.py).
            select(JobRow, func.coalesce(ModelRow.deleted_name, ModelRow.name),
                   VersionRow.number)
            .join(ModelRow, ModelRow.id == JobRow.model_id)
            .outerjoin(VersionRow, VersionRow.id == JobRow.version_id)
            .where(JobRow.id == job_id)
        ).first()
        if row is None or (only is not None and row[1] not in only):
            raise NotFoundError(f"There is no job {job_id}.")
        job, model_name, number = row
        return job_view(job, model_name, number)
