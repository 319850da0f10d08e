"""The worker's retention pass beyond cases and snapshots: drift tallies of
hours older than KEELSON_DRIFT_TALLY_RETENTION_DAYS, and the tombstone rows
of deleted models whose delete job finished more than
KEELSON_TOMBSTONE_RETENTION_DAYS ago, go in batches; the rest stays.

Our own rule; no outside source."""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import select, update

import service.worker.upkeep as upkeep
from service.store.database import Database
from service.store.tables import DriftTallyRow, JobRow, ModelRow, tombstone_name
from service.usecases.common import as_utc
from service.worker.settings import WorkerSettings
from tests.worker.factories import create_model, create_version
from tests.worker.helpers import database

NOW = dt.datetime(2026, 12, 3, 12, 0, tzinfo=dt.UTC)


def add_tallies(db: Database, hours_ago: list[float]) -> None:
    with db.write() as session:
        model = create_model(session, f"pump-{len(hours_ago)}")
        version = create_version(session, model, 1)
        for index, hours in enumerate(hours_ago):
            session.add(DriftTallyRow(
                model_id=model.id, version_id=version.id, writer=f"w{index}",
                bucket_start=NOW - dt.timedelta(hours=hours), predictions=1,
                counts=b"\x01" + b"\x00" * 7))
        session.commit()


def tally_ages(db: Database) -> list[float]:
    with db.read() as session:
        starts = session.scalars(select(DriftTallyRow.bucket_start)).all()
    return sorted(round((NOW - as_utc(s)).total_seconds() / 3600, 1)
                  for s in starts)


def test_old_drift_tallies_go_in_batches(database_url: str,
                                         monkeypatch: pytest.MonkeyPatch) -> None:
    db = database(database_url)
    try:
        days = 24.0
        add_tallies(db, [1, 23.5 * 24, 24.5 * 24, 30 * 24, 400 * 24])
        monkeypatch.setattr(upkeep, "TALLY_BATCH", 2)
        assert upkeep.purge_drift_tallies(db.write, db.read, days, now=NOW,
                                          max_batches=1) == (2, True)
        assert upkeep.purge_drift_tallies(db.write, db.read, days, now=NOW) == (1, False)
        assert tally_ages(db) == [1.0, 23.5 * 24]
    finally:
        db.engine.dispose()


def deleted_model(db: Database, name: str, job_status: str,
                  finished: dt.datetime | None) -> int:
    with db.write() as session:
        model = create_model(session, name)
        session.execute(update(ModelRow).where(ModelRow.id == model.id).values(
            name=tombstone_name(model.id), deleted_name=name))
        session.add(JobRow(model_id=model.id, kind="delete", status=job_status, params={},
                           finished_at=finished))
        session.commit()
        return model.id


def test_tombstones_go_once_their_delete_job_finished_long_enough_ago(
        database_url: str) -> None:
    db = database(database_url)
    try:
        old = deleted_model(db, "pump-old", "succeeded", NOW - dt.timedelta(days=31))
        recent = deleted_model(db, "pump-recent", "succeeded", NOW - dt.timedelta(days=29))
        running = deleted_model(db, "pump-running", "running", None)
        failed = deleted_model(db, "pump-failed", "failed", NOW - dt.timedelta(days=90))
        with db.write() as session:
            alive = create_model(session, "pump-alive").id
            session.commit()
        assert upkeep.purge_tombstones(db.write, db.read, 30, now=NOW) == (1, False)
        with db.read() as session:
            models = set(session.scalars(select(ModelRow.id)))
            jobs = set(session.scalars(select(JobRow.model_id)))
        assert models == {recent, running, failed, alive}
        assert jobs == {recent, running, failed}
        assert old not in jobs
    finally:
        db.engine.dispose()


def test_one_pass_runs_every_kind(database_url: str) -> None:
    db = database(database_url)
    try:
        add_tallies(db, [500 * 24])
        deleted_model(db, "pump-old", "succeeded", NOW - dt.timedelta(days=31))
        settings = WorkerSettings(database_url=database_url)
        done = upkeep.retention_pass(settings, db.write, db.read, now=NOW)
        assert (done.tallies, done.tombstones, done.more) == (1, 1, False)
        assert tally_ages(db) == []
    finally:
        db.engine.dispose()
