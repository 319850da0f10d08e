"""Retention of scored cases (docs/http-api.md, "Scored cases"): a case still
without an outcome is deleted KEELSON_CASE_RETENTION_DAYS after it was scored,
by the worker, in batches; a case with an outcome, or a recent one, stays."""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import select

import service.worker.retention as retention
from service.store.database import Database
from service.store.tables import ScoredCaseRow, utcnow
from tests.worker.helpers import database, new_model, numeric_spec, wait_until, worker_thread

NOW = dt.datetime(2026, 12, 3, 12, 0, tzinfo=dt.UTC)


def add_cases(db: Database, model_id: int, prefix: str, n: int, *, age_days: float,
              resolved: bool = False, now: dt.datetime = NOW) -> None:
    scored = now - dt.timedelta(days=age_days)
    with db.write() as session:
        session.add_all(ScoredCaseRow(
            model_id=model_id, key=f"{prefix}-{i}", features={"x0": float(i)}, version_id=None,
            output={"false": 0.5, "true": 0.5}, scored_at=scored, rescored=0,
            outcome=True if resolved else None, outcome_at=scored if resolved else None)
            for i in range(n))
        session.commit()


def keys(db: Database) -> set[str]:
    with db.read() as session:
        return set(session.scalars(select(ScoredCaseRow.key)))


def test_expired_unresolved_cases_are_deleted_in_batches(
        database_url: str, monkeypatch: pytest.MonkeyPatch) -> None:
    db = database(database_url)
    try:
        first = new_model(db, numeric_spec("first", ["x0"]))
        second = new_model(db, numeric_spec("second", ["x0"]))
        add_cases(db, first, "old", 5, age_days=181)
        add_cases(db, second, "old2", 2, age_days=400)
        add_cases(db, first, "solved", 3, age_days=300, resolved=True)
        add_cases(db, first, "young", 4, age_days=179)
        monkeypatch.setattr(retention, "BATCH", 2)
        # Two batches of two, then a call that is told more may remain.
        assert retention.purge_expired_cases(db.write, db.read, 180, now=NOW,
                                             max_batches=2) == (4, True)
        assert retention.purge_expired_cases(db.write, db.read, 180, now=NOW) == (3, False)
        assert keys(db) == {*(f"solved-{i}" for i in range(3)),
                            *(f"young-{i}" for i in range(4))}
    finally:
        db.engine.dispose()


def test_the_worker_deletes_expired_cases_by_itself(database_url: str) -> None:
    db = database(database_url)
    try:
        model = new_model(db, numeric_spec("cases", ["x0"]))
        now = utcnow()
        add_cases(db, model, "old", 3, age_days=2.5, now=now)
        add_cases(db, model, "young", 2, age_days=0.5, now=now)
        with worker_thread(database_url, KEELSON_CASE_RETENTION_DAYS=1):
            wait_until(lambda: keys(db) == {"young-0", "young-1"})
    finally:
        db.engine.dispose()


def test_a_fleet_past_the_batches_of_one_call_is_looked_at_whole(database_url: str) -> None:
    # A model with nothing expired takes no batch of a call (one read probe):
    # with more such models than a call's batches, the last model's cases are
    # still deleted, and the call says nothing more remains.
    db = database(database_url)
    try:
        quiet = [new_model(db, numeric_spec(f"quiet-{i}", ["x0"]))
                 for i in range(retention.MAX_BATCHES + 2)]
        for n, model_id in enumerate(quiet):
            add_cases(db, model_id, f"young{n}", 1, age_days=10)
        last = new_model(db, numeric_spec("last", ["x0"]))
        add_cases(db, last, "old", 3, age_days=200)
        assert retention.purge_expired_cases(db.write, db.read, 180, now=NOW) == (3, False)
        assert keys(db) == {f"young{n}-0" for n in range(len(quiet))}
    finally:
        db.engine.dispose()
