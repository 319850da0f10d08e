"""Use cases for models: create, show, list."""

from __future__ import annotations

from collections.abc import Collection, Mapping
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

import engine
from service.errors import ConflictError, InvalidInputError
from service.store.database import Database, transaction
from service.store.model_events import CREATED, add_event, settings_of
from service.store.tables import ModelRow, RecordRow, TrainerRow, VersionRow
from service.usecases.common import find_model, model_view
from service.usecases.model_limits import ModelLimits, size_errors
from service.usecases.predictions import QUERY_NAMES


def create_model(db: Database, validated: Mapping[str, Any], limits: ModelLimits,
                 *, token: str | None = None) -> dict[str, Any]:
    """Store a model from a validated spec, defaults filled by the engine, with
    its online trainer at cursor 0. InvalidInputError when it breaks a size
    limit, ConflictError when the name is taken."""
    try:
        spec = engine.apply_defaults(validated)
    except engine.InvalidInputError as exc:
        raise InvalidInputError(
            "The model spec is invalid.", errors={exc.field or "body": [str(exc)]}
        ) from exc
    too_large = size_errors(spec, limits)
    if too_large:
        raise InvalidInputError("The model is larger than this server allows.",
                                errors=too_large)
    taken = ConflictError(f"A model named {spec['name']!r} already exists.")
    try:
        with transaction(db.write) as session:
            if session.scalar(select(ModelRow.id).where(ModelRow.name == spec["name"])):
                raise taken
            row = ModelRow(name=spec["name"], spec=spec, records_train=0, records_holdout=0)
            session.add(row)
            session.flush()
            session.add(TrainerRow(model_id=row.id, cursor=0))
            add_event(session, row.id, CREATED, token=token, at_seq=0,
                      details={"settings": settings_of(spec)})
    except IntegrityError as exc:  # a concurrent create won the race
        raise taken from exc
    return model_view(row, active_version=None, cursor=0, lag=0)


def get_model(db: Database, name: str) -> dict[str, Any]:
    with db.read() as session:
        row = find_model(session, name)
        return _views(session, [row])[0]


def list_models(db: Database, *, limit: int, after: str | None = None,
                only: Collection[str] | None = None,
                ) -> tuple[list[dict[str, Any]], str | None]:
    """Up to ``limit`` models named after ``after``, by name, and the name to
    ask after for the next page (None when there is none); only those named in
    ``only`` when given (a token limited to models)."""
    query = (select(ModelRow).where(ModelRow.deleted_name.is_(None))
             .order_by(ModelRow.name).limit(limit + 1))
    if only is not None:
        query = query.where(ModelRow.name.in_(sorted(only)))
    if after is not None:
        query = query.where(ModelRow.name > after)
    with db.read() as session:
        rows = list(session.scalars(query))
        views = _views(session, rows[:limit])
    return views, (views[-1]["name"] if len(rows) > limit else None)


def model_states(db: Database) -> list[dict[str, Any]]:
    """Every model as GET /v1/models answers it (the metrics read their counts,
    lags and active versions at scrape time), in three queries."""
    with db.read() as session:
        return _views(session, list(session.scalars(
            select(ModelRow).where(ModelRow.deleted_name.is_(None)).order_by(ModelRow.name))))


def _views(session: Session, rows: list[ModelRow]) -> list[dict[str, Any]]:
    """Model answers with their active version numbers, cursors and lags,
    in three queries however many models there are."""
    ids = [row.id for row in rows]
    if not ids:
        return []
    active = dict(
        session.execute(
            select(ModelRow.id, VersionRow.number)
            .join(VersionRow, VersionRow.id == ModelRow.active_version_id)
            .where(ModelRow.id.in_(ids))
        ).all()
    )
    trainers = {
        model_id: (cursor, error or fault, retry_at, paused_at)
        for model_id, cursor, error, fault, retry_at, paused_at in session.execute(
            select(TrainerRow.model_id, TrainerRow.cursor, TrainerRow.error,
                   TrainerRow.fault, TrainerRow.retry_at, TrainerRow.paused_at)
            .where(TrainerRow.model_id.in_(ids))
        ).all()
    }
    # Lag counts records past the cursor: an index range scan on (model_id, seq).
    lags = dict(
        session.execute(
            select(RecordRow.model_id, func.count())
            .join(TrainerRow, TrainerRow.model_id == RecordRow.model_id)
            .where(RecordRow.model_id.in_(ids), RecordRow.seq > TrainerRow.cursor)
            .group_by(RecordRow.model_id)
        ).all()
    )
    views = []
    for row in rows:
        cursor, error, retry_at, paused_at = trainers.get(row.id, (0, None, None, None))
        views.append(model_view(row, active_version=active.get(row.id), cursor=cursor,
                                lag=lags.get(row.id, 0), error=error,
                                retry_at=None if error is None else retry_at,
                                paused_at=paused_at))
        clashes = reserved_name_clashes(row.spec)
        if clashes:
            views[-1]["reserved_name_clashes"] = clashes
    return views


def reserved_name_clashes(spec: Mapping[str, Any]) -> list[str]:
    """The features of a stored spec named like a query parameter of GET
    predictions. A new spec cannot have any (422); a model stored before a
    name was reserved keeps working: its feature wins in the query string, and
    what it hides (an option, the case key) is sent in a POST body instead."""
    return [feature["name"] for feature in spec["features"] if feature["name"] in QUERY_NAMES]
