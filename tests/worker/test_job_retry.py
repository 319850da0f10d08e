"""A retrain attempt cut short by the database (PostgreSQL's deadlock
detection, a lost connection) is tried again, and fails the job only when
every attempt did; the error of each attempt is shown on the job meanwhile.
Common practice for transient database errors, no source."""

from __future__ import annotations

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
    assert job["error"] == "Exception: deadlock detected" and job["version"] is None
    db.engine.dispose()
