"""Plain factory functions for worker tests: rows built through the store."""

from __future__ import annotations

from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from service.store.tables import JobRow, ModelRow, TrainerRow, VersionRow
from service.worker.leasing import claim_job


def create_model(session: Session, name: str = "pump-risk", **spec: Any) -> ModelRow:
    """A model row with a small binary spec (overridable) and its trainer row."""
    full: dict[str, Any] = {
        "name": name,
        "task": "binary",
        "target": "failed",
        "features": [{"name": "x", "type": "numeric"}],
        "promotion": "auto",
    }
    full.update(spec)
    model = ModelRow(name=name, spec=full, records_train=0, records_holdout=0)
    session.add(model)
    session.flush()
    session.add(TrainerRow(model_id=model.id, cursor=0))
    session.flush()
    return model


def create_version(
    session: Session,
    model: ModelRow,
    number: int,
    *,
    parent: VersionRow | None = None,
    origin: str = "online",
    cursor: int = 0,
    metrics: dict[str, Any] | None = None,
    status: str = "candidate",
) -> VersionRow:
    version = VersionRow(
        model_id=model.id,
        number=number,
        origin=origin,
        status=status,
        snapshot=b"not a snapshot",
        cursor=cursor,
        records_seen=cursor,
        metrics=metrics or {},
        parent_id=parent.id if parent else None,
    )
    session.add(version)
    session.flush()
    return version


def claimed_retrain(writes: sessionmaker[Session], worker: str = "a") -> tuple[int, int]:
    """A model with a retrain job queued, then claimed by ``worker``: (model id, job id)."""
    with writes() as session, session.begin():
        model_id = create_model(session).id
        session.add(JobRow(model_id=model_id, kind="retrain", status="queued", params={}))
    with writes() as session, session.begin():
        job = claim_job(session, worker, 30)
        assert job is not None
        return model_id, job.id
