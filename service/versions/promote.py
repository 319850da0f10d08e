"""How a version becomes the one that serves: a pointer move, under row locks.

Promotion moves a pointer (docs/architecture.md, invariant 3): versions never
change apart from their ``status`` and ``promoted_at``. ``promote`` is the one
way a version becomes active, used by the worker's ``auto`` policy and by the
admin's promote endpoint (which is also the rollback path).

Lock order, everywhere (docs/architecture.md, "Locking order"): ``models`` row
first, then ``trainers`` row. Ingest holds the model row for its transaction
and the worker's checkpoint takes the trainer row, so keeping one order means
two of them can never deadlock.
"""

from __future__ import annotations

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from service.store.tables import ModelRow, TrainerRow, VersionRow, utcnow


def lock_model(session: Session, model_id: int) -> ModelRow:
    """Load the model row with a row lock (a no-op on SQLite, where a write
    session already holds the database's write lock).

    PostgreSQL's ``FOR NO KEY UPDATE``, not ``FOR UPDATE``: inserting a row
    that references the model (a version, a record, a job) takes ``FOR KEY
    SHARE`` on it, which ``FOR UPDATE`` blocks. A version writer holding the
    trainer row and inserting its version would then wait on whoever holds
    the model, while that one (an online checkpoint promoting its version)
    waits for the trainer row: a deadlock. Model keys never change, so the
    weaker lock still serialises every writer of the row."""
    return session.execute(
        select(ModelRow)
        .where(ModelRow.id == model_id)
        .with_for_update(key_share=True)
        .execution_options(populate_existing=True)
    ).scalar_one()


def promote(session: Session, model_row: ModelRow, version_row: VersionRow) -> None:
    """Make ``version_row`` the active version of ``model_row``, in the caller's
    transaction (which commits or rolls back; use a write session).

    The previously active version becomes ``retired``. When the version is not
    the online trainer's head nor one of its ancestors (a retrain, or a version
    of an abandoned lineage), it also becomes the head: online learning goes on
    from it with the records after its cursor, and a stopped lineage's error is
    cleared. Promoting an ancestor of the head (a rollback) changes only what
    is served; the lineage keeps learning from its head.
    """
    if version_row.model_id != model_row.id:
        raise ValueError("the version belongs to another model")
    model = lock_model(session, model_row.id)
    now = utcnow()
    session.execute(
        update(VersionRow)
        .where(
            VersionRow.model_id == model.id,
            VersionRow.status == "active",
            VersionRow.id != version_row.id,
        )
        .values(status="retired")
        .execution_options(synchronize_session="fetch")
    )
    version_row.status = "active"
    version_row.promoted_at = now
    model.active_version_id = version_row.id
    model_row.active_version_id = version_row.id

    trainer = session.execute(
        select(TrainerRow)
        .where(TrainerRow.model_id == model.id)
        .with_for_update()
        .execution_options(populate_existing=True)
    ).scalar_one_or_none()
    if trainer is None:
        trainer = TrainerRow(model_id=model.id, cursor=0)
        session.add(trainer)
    if not _in_lineage(session, trainer.head_version_id, version_row.id):
        trainer.head_version_id = version_row.id
        trainer.cursor = version_row.cursor
        trainer.error = None
        trainer.updated_at = now
    session.flush()


def _in_lineage(session: Session, head_id: int | None, version_id: int) -> bool:
    """True when ``version_id`` is ``head_id`` or one of its ancestors."""
    if head_id is None:
        return False
    if head_id == version_id:
        return True
    chain = (
        select(VersionRow.id, VersionRow.parent_id)
        .where(VersionRow.id == head_id)
        .cte("lineage", recursive=True)
    )
    parent = select(VersionRow.id, VersionRow.parent_id).join(
        chain, VersionRow.id == chain.c.parent_id
    )
    chain = chain.union_all(parent)
    found = session.execute(select(chain.c.id).where(chain.c.id == version_id).limit(1))
    return found.first() is not None
