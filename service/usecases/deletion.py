"""Use case: delete a model (the request; a worker does the removing).

Accepting a delete is one short transaction: the model's row takes a
tombstone name (``tombstone_name``) and keeps its former one in
``deleted_name``, its trainer is stopped and its lease dropped (a worker in
the middle of a step is fenced out, service/versions/writes.py), and a
``delete`` job is queued. From that commit on no lookup by name finds the
model (every route answers 404) and the name can be given to a new model; the
worker removes the rows in batches (service/worker/deletion.py).
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from service.errors import NotFoundError
from service.store.database import Database, transaction
from service.store.tables import JobRow, ModelRow, TrainerRow, tombstone_name, utcnow
from service.usecases.common import find_model, is_model_name, no_such_model
from service.usecases.jobs import job_view

DELETE_JOB = "delete"
# What a deleted model's trainer shows: it stops every worker from training it.
TRAINER_STOPPED = "the model is being deleted"


def request_delete(db: Database, name: str) -> dict[str, Any]:
    """Queue the delete of model ``name`` (the caller has had the name
    confirmed). Deleting a model already being deleted (or deleted) answers
    with its delete job, queued again if it had failed."""
    with transaction(db.write) as session:
        try:
            model = find_model(session, name, lock=True)
        except NotFoundError:
            return _earlier_delete(session, name)
        model.deleted_name, model.name = model.name, tombstone_name(model.id)
        model.active_version_id = None
        session.execute(
            update(TrainerRow).where(TrainerRow.model_id == model.id)
            .values(error=TRAINER_STOPPED, leased_by=None, lease_expires_at=None,
                    head_version_id=None))
        # Its queued retrains would train a model that is gone: ended here,
        # removed with the rest by the delete job.
        session.execute(
            update(JobRow).where(JobRow.model_id == model.id, JobRow.status == "queued")
            .values(status="failed", error="its model was deleted", finished_at=utcnow()))
        job = JobRow(model_id=model.id, kind=DELETE_JOB, status="queued",
                     params={}, attempts=0)
        session.add(job)
        session.flush()
        return job_view(job, name, None)


def _earlier_delete(session: Session, name: str) -> dict[str, Any]:
    """The delete job of the latest model called ``name`` that was deleted;
    a failed one is queued again (its work is safe to repeat)."""
    if not is_model_name(name):
        raise no_such_model(name)
    job = session.scalars(
        select(JobRow).join(ModelRow, ModelRow.id == JobRow.model_id)
        .where(ModelRow.deleted_name == name, JobRow.kind == DELETE_JOB)
        .order_by(JobRow.id.desc()).limit(1).with_for_update()
    ).first()
    if job is None:
        raise no_such_model(name)
    if job.status == "failed":
        job.status, job.error, job.attempts, job.finished_at = "queued", None, 0, None
        session.flush()
    return job_view(job, name, None)
