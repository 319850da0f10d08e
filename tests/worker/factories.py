"""Plain factory functions for worker tests: rows built through the store."""

from __future__ import annotations

from typing import Any

from sqlalchemy.orm import Session

from service.store import ModelRow, TrainerRow, VersionRow


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
