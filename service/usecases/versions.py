"""Use cases for versions: list, show, promote (also the rollback path).

Versions are immutable; their snapshots are never loaded here (they can be
large), only the columns an answer shows.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import Row, select
from sqlalchemy.orm import Session, aliased, defer

from service.errors import NotFoundError
from service.store.database import Database, transaction
from service.store.model_events import PROMOTED, add_event
from service.store.tables import VersionRow
from service.usecases.common import as_utc, find_model
from service.versions.promote import promote

_Parent = aliased(VersionRow)
_COLUMNS = (
    VersionRow.id, VersionRow.number, VersionRow.origin, VersionRow.status,
    VersionRow.records_seen, VersionRow.cursor, VersionRow.metrics,
    VersionRow.created_at, VersionRow.promoted_at, _Parent.number.label("parent"),
    VersionRow.settings_from_seq, VersionRow.forgotten_records,
)


def version_view(row: Row[Any]) -> dict[str, Any]:
    return {
        "number": row.number,
        "origin": row.origin,
        "status": row.status,
        "records_seen": row.records_seen,
        "cursor": row.cursor,
        "metrics": row.metrics,
        "created_at": as_utc(row.created_at),
        "promoted_at": as_utc(row.promoted_at),
        "parent": row.parent,
        "settings_from_seq": row.settings_from_seq,
        "forgotten_records": row.forgotten_records,
    }


def _select_versions(model_id: int) -> Any:
    return (
        select(*_COLUMNS)
        .outerjoin(_Parent, _Parent.id == VersionRow.parent_id)
        .where(VersionRow.model_id == model_id)
    )


def list_versions(db: Database, name: str, *, limit: int, after: int | None = None
                  ) -> tuple[list[dict[str, Any]], int | None]:
    """Up to ``limit`` versions numbered above ``after``, oldest first, and the
    number to ask after for the next page (None when there is none)."""
    with db.read() as session:
        model = find_model(session, name)
        query = _select_versions(model.id).order_by(VersionRow.number).limit(limit + 1)
        if after is not None:
            query = query.where(VersionRow.number > after)
        views = [version_view(row) for row in session.execute(query)]
    if len(views) > limit:
        return views[:limit], views[limit - 1]["number"]
    return views, None


def get_version(db: Database, name: str, number: int) -> dict[str, Any]:
    with db.read() as session:
        model = find_model(session, name)
        return _one(session, model.id, name, number)


def promote_version(db: Database, name: str, number: int, *, token: str | None = None,
                    reason: str | None = None) -> dict[str, Any]:
    """Make version ``number`` the active one (idempotent for the active one:
    promoting it again changes nothing and records nothing)."""
    with transaction(db.write) as session:
        model = find_model(session, name, lock=True)
        version = session.scalars(
            select(VersionRow)
            .options(defer(VersionRow.snapshot))  # never load weights to move a pointer
            .where(VersionRow.model_id == model.id, VersionRow.number == number)
        ).first()
        if version is None:
            raise NotFoundError(f"Model {name!r} has no version {number}.")
        if model.active_version_id != version.id:
            replaced = None if model.active_version_id is None else session.scalar(
                select(VersionRow.number).where(VersionRow.id == model.active_version_id))
            promote(session, model, version)
            add_event(session, model.id, PROMOTED, token=token, reason=reason, details={
                "version": number, "automatic": False, "replaced": replaced})
    with db.read() as session:
        return _one(session, model.id, name, number)


def _one(session: Session, model_id: int, name: str, number: int) -> dict[str, Any]:
    row = session.execute(
        _select_versions(model_id).where(VersionRow.number == number)
    ).first()
    if row is None:
        raise NotFoundError(f"Model {name!r} has no version {number}.")
    return version_view(row)
