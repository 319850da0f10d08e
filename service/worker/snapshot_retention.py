"""Snapshot retention: the snapshots of old online versions that were never
active are pruned; the versions themselves stay.

A model checkpointing every 1,000 records writes 1,000 versions per million
records; most are never served. A version's snapshot is pruned (``snapshot``
set to NULL, ``pruned_at`` set) when all of these hold:

* it is an online version (a retrain's is the only copy of a fit that no
  replay of the record log reproduces);
* it was never active: ``promoted_at`` is NULL, its status is not
  ``active``, and no ``promoted`` event of the model's history names it;
* it is older than ``KEELSON_SNAPSHOT_RETENTION_DAYS``;
* it is not among the model's newest ``KEELSON_SNAPSHOT_KEEP_LAST`` versions;
* nothing needs it: it is not the trainer's head (online learning goes on
  from it), not the model's active version (the holdout comparison scores
  against it), and no queued or running job points at it.

The row, its metrics, its lineage (``parent_id``) and everything pointing at
it stay. The API answers for such a version with 410 (service/usecases/
pruned.py), and ``keelson replay`` can rebuild its snapshot from the record
log.

In batches of ``BATCH`` versions, one short write transaction each (an
UPDATE of rows no request writes: ingest and predictions never wait on it
for more than a batch on SQLite, and not at all on PostgreSQL). Each UPDATE
checks the rule again in its WHERE clause, so a version promoted between the
finding and the pruning keeps its snapshot; promoting locks the version row
and refuses a pruned one (service/usecases/versions.py), so the two cannot
cross.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import ColumnElement, func, or_, select, update
from sqlalchemy.orm import Session, sessionmaker

from service.store.database import transaction
from service.store.model_events import PROMOTED
from service.store.tables import JobRow, ModelEventRow, ModelRow, TrainerRow, VersionRow, utcnow

BATCH = 100  # versions pruned per transaction
MAX_BATCHES = 10  # per call: the worker's loop goes on between calls
WAITING_JOBS = ("queued", "running")


def prune_snapshots(writes: sessionmaker[Session], reads: sessionmaker[Session],
                    retention_days: float, keep_last: int, *, now: dt.datetime | None = None,
                    max_batches: int = MAX_BATCHES) -> tuple[int, bool]:
    """Prune up to ``max_batches`` batches of snapshots; how many were pruned,
    and whether some may remain (call again soon)."""
    now = now or utcnow()
    cutoff = now - dt.timedelta(days=retention_days)
    with reads() as session:
        models = list(session.scalars(select(ModelRow.id).where(
            ModelRow.deleted_name.is_(None)).order_by(ModelRow.id)))
    pruned, batches = 0, 0
    for model_id in models:
        with reads() as session:
            newest = session.scalar(select(func.max(VersionRow.number))
                                    .where(VersionRow.model_id == model_id))
            if newest is None or newest <= keep_last:
                continue
            kept = _promoted_numbers(session, model_id)
        below = newest - keep_last  # numbers above this are the newest keep_last
        while True:
            if batches == max_batches:
                return pruned, True
            rule = prunable(model_id, cutoff, below, kept)
            with reads() as session:  # found outside the write lock; checked again inside
                found = list(session.scalars(select(VersionRow.id).where(*rule)
                                             .order_by(VersionRow.number).limit(BATCH)))
            removed = 0
            if found:  # only a batch with work counts: a fleet is looked at whole
                batches += 1
                with transaction(writes) as session:
                    result = session.execute(
                        update(VersionRow).where(VersionRow.id.in_(found), *rule)
                        .values(snapshot=None, pruned_at=now)
                        .execution_options(synchronize_session=False))
                    removed = int(result.rowcount)  # type: ignore[attr-defined]
            pruned += removed
            if len(found) < BATCH:
                break
    return pruned, False


def prunable(model_id: int, cutoff: dt.datetime, below: int,
             promoted_numbers: frozenset[int]) -> tuple[ColumnElement[bool], ...]:
    """The rule of the module docstring as WHERE conditions on ``versions``."""
    head = select(TrainerRow.head_version_id).where(TrainerRow.model_id == model_id)
    active = select(ModelRow.active_version_id).where(ModelRow.id == model_id)
    jobs = select(JobRow.version_id).where(JobRow.model_id == model_id,
                                           JobRow.status.in_(WAITING_JOBS),
                                           JobRow.version_id.is_not(None))
    rule: list[ColumnElement[bool]] = [
        VersionRow.model_id == model_id,
        VersionRow.pruned_at.is_(None),
        VersionRow.origin == "online",
        VersionRow.promoted_at.is_(None),
        VersionRow.status != "active",
        VersionRow.created_at < cutoff,
        VersionRow.number <= below,
        # NULL-safe: "id <> (NULL)" would be unknown, which keeps everything.
        or_(head.scalar_subquery().is_(None), VersionRow.id != head.scalar_subquery()),
        or_(active.scalar_subquery().is_(None), VersionRow.id != active.scalar_subquery()),
        VersionRow.id.not_in(jobs),
    ]
    if promoted_numbers:
        rule.append(VersionRow.number.not_in(sorted(promoted_numbers)))
    return tuple(rule)


def _promoted_numbers(session: Session, model_id: int) -> frozenset[int]:
    """The version numbers the model's history says were promoted (a version
    promoted before ``promoted_at`` was kept, or by a restore, is still kept)."""
    details: list[Any] = list(session.scalars(select(ModelEventRow.details).where(
        ModelEventRow.model_id == model_id, ModelEventRow.kind == PROMOTED)))
    return frozenset(int(d["version"]) for d in details
                     if isinstance(d, dict) and isinstance(d.get("version"), int))
