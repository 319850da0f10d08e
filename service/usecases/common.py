"""Helpers the use cases share: finding a model by name, and answer shapes."""

from __future__ import annotations

import datetime as dt
import re
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from service.errors import NotFoundError
from service.store.tables import ModelRow

# What a model name may be: it is a URL path segment and a metric label.
MODEL_NAME_PATTERN = r"[a-z0-9][a-z0-9-]{0,63}"
_MODEL_NAME = re.compile(MODEL_NAME_PATTERN)


def is_model_name(name: str) -> bool:
    """Whether ``name`` could name a model (anything else names none)."""
    return _MODEL_NAME.fullmatch(name) is not None


def no_such_model(name: str) -> NotFoundError:
    """The one answer for a model that is not there, or not there for this
    token (a token limited to other models gets it too, word for word)."""
    return NotFoundError(f"There is no model named {name!r}.")


def find_model(session: Session, name: str, *, lock: bool = False) -> ModelRow:
    """The model called ``name``; NotFoundError when there is none.

    A name that could never be valid (``..``, uppercase, too long) is simply
    not found: it never reaches the database. ``lock`` takes the row lock
    (``SELECT ... FOR NO KEY UPDATE``, see ``service.versions.promote.lock_model``;
    on SQLite the write session's BEGIN IMMEDIATE already holds the database
    lock).
    """
    if not is_model_name(name):
        raise no_such_model(name)
    query = select(ModelRow).where(ModelRow.name == name)
    if lock:  # and refresh a row this session may hold from an earlier transaction
        query = query.with_for_update(key_share=True).execution_options(
            populate_existing=True)
    row = session.scalars(query).first()
    if row is None:
        raise no_such_model(name)
    return row


def as_utc(moment: dt.datetime | None) -> dt.datetime | None:
    """SQLite hands back naive datetimes; every stored time is UTC."""
    if moment is None or moment.tzinfo is not None:
        return moment
    return moment.replace(tzinfo=dt.UTC)


def model_view(
    row: ModelRow, *, active_version: int | None, cursor: int, lag: int,
    error: str | None = None, retry_at: dt.datetime | None = None,
    paused_at: dt.datetime | None = None,
) -> dict[str, Any]:
    """GET /v1/models/{name}: the stored spec and the model's state; the
    trainer's ``error`` only when it cannot train (records then wait), with
    ``retry_at`` when the worker tries again by itself (a back-off) and without
    it when the lineage stopped until a promotion; ``paused`` while an admin
    has paused online training (with ``paused_at``)."""
    trainer: dict[str, Any] = {"cursor": cursor, "lag": lag, "paused": paused_at is not None}
    if paused_at is not None:
        trainer["paused_at"] = as_utc(paused_at)
    if error is not None:
        trainer["error"] = error
    if retry_at is not None:
        trainer["retry_at"] = as_utc(retry_at)
    return {
        **row.spec,
        "name": row.name,
        "active_version": active_version,
        "records": {
            "total": row.records_train + row.records_holdout,
            "train": row.records_train,
            "holdout": row.records_holdout,
        },
        "trainer": trainer,
        "created_at": as_utc(row.created_at),
    }
