"""Snapshot retention (docs/architecture.md, "Storage over years"): the
snapshot of an online version never active, older than
KEELSON_SNAPSHOT_RETENTION_DAYS and not among the newest
KEELSON_SNAPSHOT_KEEP_LAST is pruned, in batches; every other version keeps
its snapshot, and every version keeps its row, metrics and lineage.

Our own rule; no outside source."""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import select, update

import service.worker.snapshot_retention as retention
from service.store.database import Database
from service.store.model_events import PROMOTED, add_event
from service.store.tables import JobRow, ModelRow, TrainerRow, VersionRow, utcnow
from tests.worker.factories import create_model, create_version
from tests.worker.helpers import database, wait_until, worker_thread

NOW = dt.datetime(2026, 12, 3, 12, 0, tzinfo=dt.UTC)
OLD = NOW - dt.timedelta(days=60)


def build(db: Database, name: str, count: int, *, created: dt.datetime = OLD) -> int:
    """A model with versions 1..count in one lineage, all created at ``created``."""
    with db.write() as session:
        model = create_model(session, name)
        parent = None
        for number in range(1, count + 1):
            parent = create_version(session, model, number, parent=parent, cursor=number,
                                    metrics={"holdout": {"n": number}})
        session.execute(update(VersionRow).where(VersionRow.model_id == model.id)
                        .values(created_at=created))
        session.commit()
        return model.id


def version_id(db: Database, model_id: int, number: int) -> int:
    with db.read() as session:
        return int(session.scalars(select(VersionRow.id).where(
            VersionRow.model_id == model_id, VersionRow.number == number)).one())


def pruned_numbers(db: Database, model_id: int) -> set[int]:
    with db.read() as session:
        rows = session.execute(select(VersionRow.number, VersionRow.snapshot,
                                      VersionRow.pruned_at)
                               .where(VersionRow.model_id == model_id)).all()
    for _number, snapshot, pruned_at in rows:
        assert (snapshot is None) == (pruned_at is not None)
    return {number for number, snapshot, _ in rows if snapshot is None}


def test_only_old_never_active_unneeded_online_versions_lose_their_snapshot(
        database_url: str, monkeypatch: pytest.MonkeyPatch) -> None:
    db = database(database_url)
    try:
        model = build(db, "pump-risk", 30)
        other = build(db, "pump-flow", 15)  # fewer than keep_last: nothing goes
        ids = {n: version_id(db, model, n) for n in range(1, 31)}
        with db.write() as session:
            # 1: was active once (retired since).
            session.execute(update(VersionRow).where(VersionRow.id == ids[1])
                            .values(status="retired", promoted_at=OLD))
            # 2: the active version.
            session.execute(update(VersionRow).where(VersionRow.id == ids[2])
                            .values(status="active", promoted_at=OLD))
            session.execute(update(ModelRow).where(ModelRow.id == model)
                            .values(active_version_id=ids[2]))
            # 3: a retrain's version.
            session.execute(update(VersionRow).where(VersionRow.id == ids[3])
                            .values(origin="retrain"))
            # 4: promoted by the history alone (no promoted_at).
            add_event(session, model, PROMOTED, details={"version": 4, "automatic": True,
                                                         "replaced": None})
            # 5: the trainer's head, which online learning continues from.
            session.execute(update(TrainerRow).where(TrainerRow.model_id == model)
                            .values(head_version_id=ids[5]))
            # 6: what a queued job points at.
            session.add(JobRow(model_id=model, kind="retrain", status="queued", params={},
                               version_id=ids[6]))
            # 7: young.
            session.execute(update(VersionRow).where(VersionRow.id == ids[7])
                            .values(created_at=NOW - dt.timedelta(days=29)))
            session.commit()
        with db.read() as session:
            before = {v.number: (v.metrics, v.parent_id, v.cursor) for v in session.scalars(
                select(VersionRow).where(VersionRow.model_id == model))}
        monkeypatch.setattr(retention, "BATCH", 2)
        # 8, 9, 10 go (11..30 are the newest 20): a batch of two, then "more may remain".
        assert retention.prune_snapshots(db.write, db.read, 30, 20, now=NOW,
                                         max_batches=1) == (2, True)
        assert pruned_numbers(db, model) == {8, 9}
        assert retention.prune_snapshots(db.write, db.read, 30, 20, now=NOW) == (1, False)
        assert retention.prune_snapshots(db.write, db.read, 30, 20, now=NOW) == (0, False)
        assert pruned_numbers(db, model) == {8, 9, 10}
        assert pruned_numbers(db, other) == set()
        with db.read() as session:
            after = {v.number: (v.metrics, v.parent_id, v.cursor) for v in session.scalars(
                select(VersionRow).where(VersionRow.model_id == model))}
            kept = session.scalars(select(VersionRow.snapshot).where(
                VersionRow.model_id == model, VersionRow.number == 11)).one()
        assert after == before  # rows, metrics and lineage all stay
        assert kept == b"not a snapshot"
        # Keeping fewer of the newest lets 11 go too; 0 keeps none by number
        # (the other model's too), but still every version the rule keeps.
        assert retention.prune_snapshots(db.write, db.read, 30, 19, now=NOW) == (1, False)
        assert pruned_numbers(db, model) == {8, 9, 10, 11}
        assert retention.prune_snapshots(db.write, db.read, 30, 0, now=NOW,
                                         max_batches=100) == (19 + 15, False)
        assert pruned_numbers(db, model) == set(range(8, 31))
        assert pruned_numbers(db, other) == set(range(1, 16))
    finally:
        db.engine.dispose()


def test_a_version_promoted_after_it_was_found_keeps_its_snapshot(database_url: str) -> None:
    """The UPDATE checks the rule again: what was found a moment before and
    promoted since is not pruned."""
    db = database(database_url)
    try:
        model = build(db, "pump-risk", 3)
        rule = retention.prunable(model, NOW, 3, frozenset())
        with db.read() as session:
            found = list(session.scalars(select(VersionRow.id).where(*rule)))
        assert len(found) == 3
        with db.write() as session:
            session.execute(update(VersionRow).where(VersionRow.id == found[0])
                            .values(status="active", promoted_at=NOW))
            session.commit()
        assert retention.prune_snapshots(db.write, db.read, 30, 0, now=NOW) == (2, False)
        assert pruned_numbers(db, model) == {2, 3}
    finally:
        db.engine.dispose()


def test_the_worker_prunes_by_itself(database_url: str) -> None:
    db = database(database_url)
    try:
        now = utcnow()
        model = build(db, "pump-risk", 4, created=now - dt.timedelta(days=3))
        with worker_thread(database_url, KEELSON_SNAPSHOT_RETENTION_DAYS=2,
                           KEELSON_SNAPSHOT_KEEP_LAST=1):
            wait_until(lambda: pruned_numbers(db, model) == {1, 2, 3})
    finally:
        db.engine.dispose()


def test_a_fleet_past_the_batches_of_one_call_is_looked_at_whole(database_url: str) -> None:
    # Models with nothing to prune take no batch of a call: with more of them
    # than a call's batches, the last model's versions are still pruned, and
    # the call says nothing more remains (the worker comes back in a minute,
    # not at its next poll).
    db = database(database_url)
    try:
        quiet = [build(db, f"quiet-{i}", 3, created=NOW) for i in range(retention.MAX_BATCHES + 2)]
        last = build(db, "last", 5)
        assert retention.prune_snapshots(db.write, db.read, 30, 2, now=NOW) == (3, False)
        assert pruned_numbers(db, last) == {1, 2, 3}
        assert all(pruned_numbers(db, model_id) == set() for model_id in quiet)
    finally:
        db.engine.dispose()
