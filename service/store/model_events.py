"""A model's history: adding an event, in the transaction of the act it records.

Every event carries the model's last record sequence at that moment
(``at_seq``): a settings change takes effect after it, so the history says
which records were learned under which settings. One index range read
(``ix_records_model_id_seq``), paid only by admin acts and versions.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from service.store.tables import ModelEventRow, RecordRow

# The kinds of event a history holds (docs/http-api.md, "History").
CREATED = "created"
SETTINGS_CHANGED = "settings_changed"
PROMOTED = "promoted"
RETRAIN_REQUESTED = "retrain_requested"
PAUSED = "paused"
RESUMED = "resumed"
RECORDS_FORGOTTEN = "records_forgotten"
KINDS = (CREATED, SETTINGS_CHANGED, PROMOTED, RETRAIN_REQUESTED, PAUSED, RESUMED,
         RECORDS_FORGOTTEN)


# The settings a change may touch; an event records them whole, as they are
# from its position on (service/usecases/settings.py).
SETTINGS_KEYS = ("promotion", "training", "alarm")


def settings_of(spec: Mapping[str, Any]) -> dict[str, Any]:
    return {key: spec[key] for key in SETTINGS_KEYS if key in spec}


def settings_changes(session: Session, model_id: int, after_id: int = 0
                     ) -> list[tuple[int, int, dict[str, Any]]]:
    """(event id, at_seq, settings) of the model's settings changes after
    event ``after_id``, in the order they were made."""
    rows = session.execute(
        select(ModelEventRow.id, ModelEventRow.at_seq, ModelEventRow.details)
        .where(ModelEventRow.model_id == model_id, ModelEventRow.id > after_id,
               ModelEventRow.kind == SETTINGS_CHANGED)
        .order_by(ModelEventRow.id))
    return [(int(i), int(at), dict(details["settings"])) for i, at, details in rows]


def created_settings(session: Session, model_id: int) -> dict[str, Any] | None:
    """The settings the model was created with: its ``created`` event's, or
    for a model created before its history was kept, its first change's with
    that change undone (None when it has neither: its spec is as created)."""
    details = session.scalar(
        select(ModelEventRow.details)
        .where(ModelEventRow.model_id == model_id,
               ModelEventRow.kind.in_((CREATED, SETTINGS_CHANGED)))
        .order_by(ModelEventRow.id).limit(1))
    if details is None or "settings" not in details:
        return None
    settings = {key: dict(value) if isinstance(value, dict) else value
                for key, value in details["settings"].items()}
    for path, change in details.get("changes", {}).items():  # a change: undo it
        key, _, inner = path.partition(".")
        if inner:
            settings[key][inner] = change["from"]
        elif change["from"] is None:  # the spec had no such section then
            settings.pop(key, None)
        else:
            settings[key] = change["from"]
    return settings


def last_seq(session: Session, model_id: int) -> int:
    """The model's last record sequence (0 before any record), counting
    forgotten ones: a forget's ``at_seq`` is the last sequence before it
    removed anything, so a position handed out here never falls behind one
    the trainer or a version has already passed."""
    stored = session.scalar(select(func.max(RecordRow.seq)).where(RecordRow.model_id == model_id))
    return max(int(stored or 0), forgotten_upto(session, model_id))


def forgotten_upto(session: Session, model_id: int) -> int:
    """The highest sequence the model ever had before a forget (0: never forgot)."""
    found = session.scalar(select(func.max(ModelEventRow.at_seq)).where(
        ModelEventRow.model_id == model_id, ModelEventRow.kind == RECORDS_FORGOTTEN))
    return int(found or 0)


def add_event(session: Session, model_id: int, kind: str, *, token: str | None = None,
              reason: str | None = None, details: Mapping[str, Any] | None = None,
              at_seq: int | None = None) -> ModelEventRow:
    """Add one event (the caller's transaction commits it with the act)."""
    if kind not in KINDS:
        raise ValueError(f"unknown event kind {kind!r}")
    event = ModelEventRow(model_id=model_id, kind=kind, token=token, reason=reason,
                          details=dict(details or {}),
                          at_seq=last_seq(session, model_id) if at_seq is None else at_seq)
    session.add(event)
    return event
