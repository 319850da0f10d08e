"""A retrain attempt cut short by the database (PostgreSQL's deadlock
detection, a lost connection) is tried again, and fails the job only when
every attempt did; the error of each attempt is shown on the job meanwhile.
Common practice for transient database errors, no source."""

from __future__ import annotations

import logging
from typing import Any

import pytest
from sqlalchemy.exc import OperationalError

from service.usecases.jobs import get_job, request_retrain
from service.worker import job_runner
from service.worker.leasing import MAX_JOB_ATTEMPTS
from tests.worker.helpers import database, new_model, numeric_spec, send, wait_until, worker_thread

FIELDS = ["a", "b"]


def deadlock() -> OperationalError:
    return OperationalError("INSERT INTO versions ...", {}, Exception("deadlock detected"))


def setup(database_url: str, name: str) -> tuple[Any, int]:
    db = database(database_url)
    new_model(db, numeric_spec(name, FIELDS, hidden_layers=[4], promotion="manual",
                               training={"max_epochs": 3, "checkpoint_every": 1000}))
    send(db, name, [{"features": {"a": float(i % 7), "b": float(i % 3)}, "label": i % 2 == 0}
                    for i in range(60)])
    return db, request_retrain(db, name, warm_start=False)["id"]


def test_a_database_error_queues_the_job_again_and_the_next_attempt_succeeds(
        database_url: str, monkeypatch: pytest.MonkeyPatch) -> None:
    real, calls = job_runner.run_retrain, []

    def first_attempt_deadlocks(*args: Any, **kwargs: Any) -> Any:
        calls.append(1)
        if len(calls) == 1:
            raise deadlock()
        return real(*args, **kwargs)

    monkeypatch.setattr(job_runner, "run_retrain", first_attempt_deadlocks)
    db, job_id = setup(database_url, "retried")
    with worker_thread(database_url):
        wait_until(lambda: get_job(db, job_id)["status"] == "succeeded")
    job = get_job(db, job_id)
    assert len(calls) == 2
    assert job["version"] is not None and job["error"] is None
    db.engine.dispose()


def test_a_job_whose_every_attempt_meets_a_database_error_fails_with_it(
        database_url: str, monkeypatch: pytest.MonkeyPatch) -> None:
    calls = []

    def always_deadlocks(*args: Any, **kwargs: Any) -> Any:
        calls.append(1)
        raise deadlock()

    monkeypatch.setattr(job_runner, "run_retrain", always_deadlocks)
    db, job_id = setup(database_url, "doomed")
    with worker_thread(database_url):
        wait_until(lambda: get_job(db, job_id)["status"] == "failed")
    job = get_job(db, job_id)
    assert len(calls) == MAX_JOB_ATTEMPTS
    # The driver's text (here it would quote SQL) is for the log, not the answer.
    assert job["error"] == job_runner.DATABASE_INTERRUPTED and job["version"] is None
    db.engine.dispose()


def test_a_job_failed_by_an_unexpected_error_shows_our_words_and_logs_the_detail(
        database_url: str, monkeypatch: pytest.MonkeyPatch,
        caplog: pytest.LogCaptureFixture) -> None:
    caplog.set_level(logging.INFO, logger="keelson.worker")
    inside = "SELECT secret FROM /srv/keelson/state.db"

    def breaks(*args: Any, **kwargs: Any) -> Any:
        raise KeyError(inside)

    monkeypatch.setattr(job_runner, "run_retrain", breaks)
    db, job_id = setup(database_url, "broken")
    with worker_thread(database_url):
        wait_until(lambda: get_job(db, job_id)["status"] == "failed")
    job = get_job(db, job_id)
    assert job["error"] == "an unexpected error; the worker's log has the details"
    logged = [r for r in caplog.records if r.getMessage() == f"job {job_id}: failed"]
    assert len(logged) == 1 and logged[0].exc_info is not None
    assert inside in str(logged[0].exc_info[1])
    db.engine.dispose()
