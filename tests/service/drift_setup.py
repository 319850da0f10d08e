"""A pump model with training records and an active version whose cursor
covers them: what the drift tests compare predictions with."""

from __future__ import annotations

from typing import Any

from flask import Flask
from sqlalchemy import func, select

from service.store.tables import RecordRow
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, create_model, ingest_raw
from tests.service.predictions_factory import (
    add_version,
    pump_rows,
    pump_rule,
    stored_spec,
    train_learner,
)


def pump_model_with_reference(api: ApiClient, records: int = 400) -> int:
    """Create pump-risk, store ``records`` labelled records and an active
    version that learned from all of them; the version's id."""
    create_model(api)
    rows = pump_rows(records, seed=11)
    ingest_raw(get_database(api.app).write, "pump-risk",
               [{"features": row, "label": pump_rule(row)} for row in rows])
    with get_database(api.app).read() as session:
        last = int(session.scalar(select(func.max(RecordRow.seq))) or 0)
    learner = train_learner(stored_spec(api.app, "pump-risk"), rows, pump_rule, passes=1)
    add_version(api.app, "pump-risk", learner.to_bytes(), records_seen=last)
    return active_version_id(api.app)


def active_version_id(app: Flask) -> int:
    from tests.service.helpers import model_row

    version_id = model_row(app, "pump-risk").active_version_id
    assert version_id is not None
    return version_id


def training_features(app: Flask) -> list[dict[str, Any]]:
    """The stored features of pump-risk's training records, in order."""
    with get_database(app).read() as session:
        return list(session.scalars(select(RecordRow.features).where(
            RecordRow.split == "train").order_by(RecordRow.seq)))


def predict_query(row: dict[str, Any]) -> str:
    return (f"vibration_rms={row['vibration_rms']!r}&pump_family={row['pump_family']}"
            f"&has_vfd={'true' if row['has_vfd'] else 'false'}&explain=none")
