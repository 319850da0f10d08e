"""Use cases for a model's history and its pause switch.

Every admin act on a model is written with an event in the same transaction
(service.store.model_events), so the history never shows an act that did not
happen nor misses one that did.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import select

from service.store.database import Database, transaction
from service.store.model_events import PAUSED, RESUMED, add_event
from service.store.tables import ModelEventRow, TrainerRow, utcnow
from service.usecases.common import as_utc, find_model


def event_view(row: ModelEventRow) -> dict[str, Any]:
    return {
        "id": row.id,
        "kind": row.kind,
        "at": as_utc(row.created_at),
        "token": row.token,
        "reason": row.reason,
        "at_seq": row.at_seq,
        "details": row.details,
    }


def list_history(db: Database, name: str, *, limit: int, after: int | None = None
                 ) -> tuple[list[dict[str, Any]], int | None]:
    """Up to ``limit`` events after event ``after``, oldest first (ids grow with
    time), and the id to ask after for the next page (None when there is none)."""
    with db.read() as session:
        model = find_model(session, name)
        query = (select(ModelEventRow).where(ModelEventRow.model_id == model.id)
                 .order_by(ModelEventRow.id).limit(limit + 1))
        if after is not None:
            query = query.where(ModelEventRow.id > after)
        views = [event_view(row) for row in session.scalars(query)]
    if len(views) > limit:
        return views[:limit], views[limit - 1]["id"]
    return views, None


def set_paused(db: Database, name: str, paused: bool, *, token: str | None,
               reason: str | None) -> dict[str, Any]:
    """Pause or resume the model's online training. Idempotent: pausing a
    paused model changes nothing and records nothing. Returns the state."""
    with transaction(db.write) as session:
        model = find_model(session, name, lock=True)  # models before trainers
        trainer = session.execute(
            select(TrainerRow).where(TrainerRow.model_id == model.id).with_for_update()
            .execution_options(populate_existing=True)).scalar_one_or_none()
        if trainer is None:
            trainer = TrainerRow(model_id=model.id, cursor=0)
            session.add(trainer)
        if (trainer.paused_at is not None) != paused:
            trainer.paused_at = utcnow() if paused else None
            add_event(session, model.id, PAUSED if paused else RESUMED,
                      token=token, reason=reason)
        return {"paused": trainer.paused_at is not None,
                "paused_at": as_utc(trainer.paused_at)}
