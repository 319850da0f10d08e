"""Writing versions: one transaction each, fenced against stale writers.

A version row carries the snapshot (weights, optimizer and encoder state),
cursor, records seen and metrics; the trainer row's cursor and head move in
the same transaction (docs/architecture.md, invariant 2), so a worker that dies at any instant
leaves either the old head or the new one, never a half-written state.

Every write first locks the trainer row and checks that this worker still
holds the lease and that the head is still the version it started from. If
not (its lease expired and passed on, or a promoted retrain moved the head),
:class:`Fenced` is raised and nothing is written: the caller drops its state
and starts again from what the database says.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session, sessionmaker

from service.store.database import transaction
from service.store.model_events import PROMOTED, add_event
from service.store.tables import JobRow, TrainerRow, VersionRow, utcnow
from service.versions.decide import Promotion
from service.versions.promote import lock_model, promote


class Fenced(Exception):
    """This worker no longer owns what it was about to write."""


@dataclass(frozen=True)
class NewVersion:
    """What a version row will hold, computed before its transaction opens
    so the transaction (and its locks) stays short."""

    snapshot: bytes
    origin: str  # "online" or "retrain"
    cursor: int
    records_seen: int
    metrics: dict[str, Any]
    parent_id: int | None
    job_id: int | None = None
    settings_from_seq: int | None = None


def lock_trainer(session: Session, model_id: int) -> TrainerRow:
    return session.execute(
        select(TrainerRow)
        .where(TrainerRow.model_id == model_id)
        .with_for_update()
        .execution_options(populate_existing=True)
    ).scalar_one()


def check_owner(trainer: TrainerRow, worker_id: str, head_id: int | None) -> None:
    if trainer.leased_by != worker_id:
        raise Fenced(f"lease on model {trainer.model_id} is held by {trainer.leased_by}")
    if trainer.head_version_id != head_id:
        raise Fenced(f"head of model {trainer.model_id} moved to {trainer.head_version_id}")
    if trainer.error is not None:
        raise Fenced(f"lineage of model {trainer.model_id} is stopped")
    if trainer.paused_at is not None:  # paused mid-lease: learning stops here
        raise Fenced(f"model {trainer.model_id} is paused")


def insert_version(session: Session, model_id: int, new: NewVersion) -> VersionRow:
    """Add the version with the next number (callers hold the trainer row
    lock, which serialises version writers of one model)."""
    number = session.execute(
        select(func.coalesce(func.max(VersionRow.number), 0)).where(
            VersionRow.model_id == model_id
        )
    ).scalar_one()
    # Its parent's weights (an online step, or a warm start) carry every
    # forgotten record the parent was trained on; a retrain from scratch has
    # no parent and none. Read under the trainer lock the forget also takes.
    inherited = 0 if new.parent_id is None else session.scalar(
        select(VersionRow.forgotten_records).where(VersionRow.id == new.parent_id)) or 0
    version = VersionRow(
        model_id=model_id,
        number=int(number) + 1,
        origin=new.origin,
        status="candidate",
        snapshot=new.snapshot,
        cursor=new.cursor,
        records_seen=new.records_seen,
        metrics=new.metrics,
        parent_id=new.parent_id,
        job_id=new.job_id,
        settings_from_seq=new.settings_from_seq,
        forgotten_records=int(inherited),
    )
    session.add(version)
    session.flush()
    return version


def _maybe_promote(session: Session, model_id: int, version: VersionRow,
                   promotion: Promotion | None) -> None:
    if promotion is None:
        return
    model = lock_model(session, model_id)
    if model.active_version_id == promotion.over:
        over = None if promotion.over is None else session.scalar(
            select(VersionRow.number).where(VersionRow.id == promotion.over))
        promote(session, model, version)
        # The worker's own act: no token, no reason; the figures say why.
        add_event(session, model_id, PROMOTED, details={
            "version": version.number, "automatic": True,
            "replaced": over,
            "holdout": dict(promotion.figures or {})})


def write_online_version(
    sessions: sessionmaker[Session],
    model_id: int,
    worker_id: str,
    head_id: int | None,
    new: NewVersion,
    promotion: Promotion | None,
) -> VersionRow:
    """Write an online version and make it the trainer's head, atomically."""
    with transaction(sessions) as session:
        if promotion is not None:
            lock_model(session, model_id)  # models before trainers (promotion.py)
        trainer = lock_trainer(session, model_id)
        check_owner(trainer, worker_id, head_id)
        version = insert_version(session, model_id, new)
        trainer.cursor = new.cursor
        trainer.head_version_id = version.id
        trainer.clear_fault()  # progress stored: a back-off starts over
        trainer.updated_at = utcnow()
        session.flush()
        _maybe_promote(session, model_id, version, promotion)
        return version


def advance_cursor(
    sessions: sessionmaker[Session], model_id: int, worker_id: str, head_id: int | None,
    cursor: int,
) -> None:
    """Move the cursor past holdout records only (no train record since the
    head): the weights did not change, so no new version is needed. Hence
    ``trainers.cursor >= head.cursor`` with nothing but holdout records between."""
    with transaction(sessions) as session:
        trainer = lock_trainer(session, model_id)
        check_owner(trainer, worker_id, head_id)
        trainer.cursor = cursor
        trainer.clear_fault()
        trainer.updated_at = utcnow()


def stop_lineage(
    sessions: sessionmaker[Session], model_id: int, worker_id: str, head_id: int | None,
    error: str,
    check_head: bool = True,
) -> None:
    """Record why the lineage stopped (docs/architecture.md, invariant 6); workers skip it until a
    version of another lineage is promoted. The active version is untouched."""
    with transaction(sessions) as session:
        trainer = lock_trainer(session, model_id)
        check_owner(trainer, worker_id, head_id if check_head else trainer.head_version_id)
        trainer.error = error
        trainer.leased_by = None
        trainer.lease_expires_at = None
        trainer.updated_at = utcnow()


def write_retrain_version(
    sessions: sessionmaker[Session],
    job_id: int,
    worker_id: str,
    new: NewVersion,
    promotion: Promotion | None,
) -> VersionRow:
    """Write a retrain's version and mark its job succeeded, atomically."""
    with transaction(sessions) as session:
        job = session.get(JobRow, job_id, with_for_update=True, populate_existing=True)
        if job is None or job.leased_by != worker_id or job.status != "running":
            raise Fenced(f"job {job_id} is no longer held by {worker_id}")
        if promotion is not None:
            lock_model(session, job.model_id)
        lock_trainer(session, job.model_id)  # serialises version numbering
        version = insert_version(session, job.model_id, new)
        job.status = "succeeded"
        job.error = None  # an earlier attempt's database error, now overcome
        job.version_id = version.id
        job.finished_at = utcnow()
        job.leased_by = None
        job.lease_expires_at = None
        session.flush()
        _maybe_promote(session, job.model_id, version, promotion)
        return version
