"""One model's damaged data never stops training for the others.

Each test stores two models, damages one of them directly in the database
(as a disk fault, a hand edit or an older release's bug would leave it) and
runs a worker: the healthy model must reach zero lag, and the damaged one must
show why it cannot train (``trainer.error`` on ``GET /v1/models/{name}``, with
the time of the next try), backed off on its own, one log line per try.

The damaged model is created first: it has the lower id, so the worker leases
it in the same batch as the healthy one, and before it.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Callable, Iterator
from typing import Any

import pytest
from flask import Flask
from sqlalchemy import select, text

from service.store.database import Database
from service.store.tables import ModelRow, RecordRow, TrainerRow
from service.web.extensions import get_database
from tests.service.conftest import build_app
from tests.service.helpers import ApiClient
from tests.worker.helpers import (
    caught_up,
    database,
    new_model,
    numeric_spec,
    send,
    trainer,
    wait_until,
    worker_thread,
)

# Back-off short enough for a test to see several tries.
QUICK_RETRY = {"KEELSON_WORKER_RETRY_SECONDS": 0.1, "KEELSON_WORKER_RETRY_MAX_SECONDS": 0.4}
FAULT_LOG = "cannot train"


def rows(n: int, start: int = 0) -> list[dict[str, Any]]:
    return [{"features": {"x": float((start + i) % 11), "z": float((start + i) % 5)},
             "label": "failed" if (start + i) % 3 == 0 else "ok"} for i in range(n)]


def two_models(db: Database) -> tuple[int, int]:
    damaged = new_model(db, numeric_spec("damaged", ["x", "z"], classes=["ok", "failed"],
                                         training={"warmup_records": 40}))
    healthy = new_model(db, numeric_spec("healthy", ["x", "z"], classes=["ok", "failed"],
                                         training={"warmup_records": 40}))
    return damaged, healthy


def write_json(db: Database, table: str, column: str, value: str, where: str,
               **params: Any) -> None:
    """Store ``value`` (JSON text, possibly one the worker cannot decode) as is."""
    cast = "CAST(:value AS JSON)" if db.engine.dialect.name == "postgresql" else ":value"
    with db.engine.begin() as connection:
        connection.execute(text(f"UPDATE {table} SET {column} = {cast} WHERE {where}"),
                           {"value": value, **params})


def stored_spec(db: Database, model_id: int) -> dict[str, Any]:
    with db.read() as session:
        spec = session.scalars(select(ModelRow.spec).where(ModelRow.id == model_id)).one()
        return dict(spec)


def surrogate_class(db: Database, model_id: int) -> str:
    spec = stored_spec(db, model_id)
    spec["classes"] = ["ok", "\ud800"]  # json.dumps writes it as the escape \ud800
    write_json(db, "models", "spec", json.dumps(spec), "id = :id", id=model_id)
    return "spec"


def invalid_spec(db: Database, model_id: int) -> str:
    spec = stored_spec(db, model_id)
    spec["hidden_layers"] = "many"
    write_json(db, "models", "spec", json.dumps(spec), "id = :id", id=model_id)
    return "spec"


def surrogate_record(db: Database, model_id: int) -> str:
    with db.read() as session:
        seq = session.scalars(select(RecordRow.seq).where(RecordRow.model_id == model_id)
                              .order_by(RecordRow.seq).offset(60).limit(1)).one()
    write_json(db, "records", "features", '{"x": 1.0, "z": "\\ud800"}', "seq = :seq", seq=seq)
    return f"record {seq} cannot be read: its features are not valid JSON"


def unencodable_record(db: Database, model_id: int) -> str:
    with db.read() as session:
        seq = session.scalars(select(RecordRow.seq).where(RecordRow.model_id == model_id)
                              .order_by(RecordRow.seq).offset(60).limit(1)).one()
    write_json(db, "records", "features", '{"x": 1.0, "z": "high"}', "seq = :seq", seq=seq)
    return f"record {seq} cannot be encoded: z must be a number"


DAMAGES: dict[str, Callable[[Database, int], str]] = {
    "spec-with-a-lone-surrogate": surrogate_class,
    "spec-that-does-not-validate": invalid_spec,
    "record-with-a-lone-surrogate": surrogate_record,
    "record-that-does-not-encode": unencodable_record,
}


@pytest.fixture
def api_app(database_url: str) -> Iterator[Flask]:
    app = build_app(database_url)
    yield app
    get_database(app).engine.dispose()


def shown(api: ApiClient, name: str) -> dict[str, Any]:
    trainer_state: dict[str, Any] = api.request("GET", f"/v1/models/{name}", 200)["trainer"]
    return trainer_state


def fault_lines(caplog: pytest.LogCaptureFixture, model_id: int) -> list[logging.LogRecord]:
    return [r for r in caplog.records if r.name == "keelson.worker"
            and r.getMessage().startswith(f"model {model_id}: {FAULT_LOG}")]


@pytest.mark.parametrize("damage", list(DAMAGES), ids=list(DAMAGES))
def test_a_damaged_model_backs_off_alone_while_the_others_train(
    database_url: str, api_app: Flask, caplog: pytest.LogCaptureFixture, damage: str,
) -> None:
    caplog.set_level(logging.INFO, logger="keelson.worker")
    db = database(database_url)
    api = ApiClient(api_app)
    damaged, healthy = two_models(db)
    send(db, "damaged", rows(200))
    send(db, "healthy", rows(300))
    expected = DAMAGES[damage](db, damaged)
    with worker_thread(database_url, **QUICK_RETRY):
        wait_until(lambda: caught_up(db, healthy), timeout=20)
        send(db, "healthy", rows(200, start=300))
        wait_until(lambda: caught_up(db, healthy), timeout=20)
        wait_until(lambda: (trainer(db, damaged).faults or 0) >= 3, timeout=20)
        state = shown(api, "damaged")
    assert expected in state["error"], state
    assert "Traceback" not in state["error"]
    assert state["retry_at"]
    assert shown(api, "healthy") == {"cursor": trainer(db, healthy).cursor, "lag": 0,
                                     "paused": False}
    row = trainer(db, damaged)
    assert row.leased_by is None and row.error is None  # backed off, not stopped
    # One line per try, each try one step of the back-off (not a line per poll).
    assert len(fault_lines(caplog, damaged)) == row.faults
    db.engine.dispose()


def test_a_head_snapshot_that_does_not_load_is_backed_off_and_cleared_by_a_promotion(
    database_url: str, api_app: Flask, caplog: pytest.LogCaptureFixture,
) -> None:
    caplog.set_level(logging.INFO, logger="keelson.worker")
    db = database(database_url)
    api = ApiClient(api_app)
    damaged, healthy = two_models(db)
    send(db, "damaged", rows(200))
    with worker_thread(database_url):
        wait_until(lambda: caught_up(db, damaged), timeout=20)
    head = trainer(db, damaged).head_version_id
    assert head is not None
    with db.engine.begin() as connection:
        connection.execute(text("UPDATE versions SET snapshot = :junk WHERE id = :id"),
                           {"junk": b"PK\x03\x04 not a snapshot", "id": head})
    send(db, "damaged", rows(50, start=200))
    send(db, "healthy", rows(300))
    with worker_thread(database_url, **QUICK_RETRY):
        wait_until(lambda: caught_up(db, healthy), timeout=20)
        wait_until(lambda: (trainer(db, damaged).faults or 0) >= 2, timeout=20)
        state = shown(api, "damaged")
        assert "cannot be loaded" in state["error"] and state["retry_at"]
        # The operator's way out: promote another lineage (a retrain's version).
        api.request("POST", "/v1/models/damaged/retrain", 202, json_body={})
        wait_until(lambda: caught_up(db, damaged), timeout=30)
    assert "error" not in shown(api, "damaged")
    row = trainer(db, damaged)
    assert (row.fault, row.faults, row.retry_at) == (None, 0, None)
    db.engine.dispose()


def test_a_step_that_raises_backs_off_that_model_and_recovers_by_itself(
    database_url: str, api_app: Flask, caplog: pytest.LogCaptureFixture,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """An unexpected exception while writing one model's version (here a fault
    injected three times) backs that model off; the next try succeeds, the
    fault is cleared, and no record is lost or applied twice."""
    from service.worker import lineage

    caplog.set_level(logging.INFO, logger="keelson.worker")
    db = database(database_url)
    api = ApiClient(api_app)
    damaged, healthy = two_models(db)
    failures = {"left": 3}
    original = lineage.write_online_version

    def flaky(sessions: Any, model_id: int, *args: Any) -> Any:
        if model_id == damaged and failures["left"]:
            failures["left"] -= 1
            raise RuntimeError("injected write failure")
        return original(sessions, model_id, *args)

    monkeypatch.setattr(lineage, "write_online_version", flaky)
    send(db, "damaged", rows(200))
    send(db, "healthy", rows(300))
    with worker_thread(database_url, **QUICK_RETRY):
        wait_until(lambda: caught_up(db, healthy), timeout=20)
        wait_until(lambda: caught_up(db, damaged), timeout=20)
    assert failures["left"] == 0
    assert "error" not in shown(api, "damaged")
    lines = fault_lines(caplog, damaged)
    assert len(lines) == 3 and all("injected write failure" in r.getMessage() for r in lines)
    # A traceback is logged once, with the first try of an unexpected error.
    assert [r.exc_info is not None for r in lines] == [True, False, False]
    with db.read() as session:
        head = session.get(TrainerRow, damaged)
        assert head is not None and head.fault is None
    db.engine.dispose()


def test_a_retrain_of_a_damaged_model_fails_saying_why_and_the_next_job_runs(
    database_url: str, api_app: Flask,
) -> None:
    db = database(database_url)
    api = ApiClient(api_app)
    damaged, healthy = two_models(db)
    send(db, "damaged", rows(100))
    send(db, "healthy", rows(100))
    broken = api.request("POST", "/v1/models/damaged/retrain", 202, json_body={})["job"]["id"]
    fine = api.request("POST", "/v1/models/healthy/retrain", 202, json_body={})["job"]["id"]
    surrogate_class(db, damaged)

    def finished(job_id: int) -> dict[str, Any] | None:
        job: dict[str, Any] = api.request("GET", f"/v1/jobs/{job_id}", 200)
        return job if job["status"] in ("succeeded", "failed") else None

    with worker_thread(database_url, **QUICK_RETRY):
        failed = wait_until(lambda: finished(broken), timeout=30)
        succeeded = wait_until(lambda: finished(fine), timeout=60)
    assert failed["status"] == "failed"
    assert failed["error"] == "the model's stored spec cannot be read: it is not valid JSON text"
    assert succeeded["status"] == "succeeded" and succeeded["version"] is not None
    db.engine.dispose()


@pytest.mark.parametrize("stored", ["CAST(X'7B2280' AS TEXT)", "X'00FF'", "'{\"task\": '"],
                         ids=["text-that-is-not-utf8", "bytes", "truncated-json"])
def test_a_spec_that_is_not_json_at_all_backs_off_that_model_only(
    sqlite_url: str, caplog: pytest.LogCaptureFixture, stored: str,
) -> None:
    """Bytes PostgreSQL's JSON type would refuse, written into SQLite's column:
    SQLite's driver fails on text that is not UTF-8 with an OperationalError,
    which must count as this model's fault, not as the database going away."""
    caplog.set_level(logging.INFO, logger="keelson.worker")
    db = database(sqlite_url)
    damaged, healthy = two_models(db)
    send(db, "damaged", rows(100))  # records to learn: only such a model is leased
    send(db, "healthy", rows(300))
    with db.engine.begin() as connection:
        connection.execute(text(f"UPDATE models SET spec = {stored} WHERE id = :id"),
                           {"id": damaged})
    with worker_thread(sqlite_url, **QUICK_RETRY):
        wait_until(lambda: caught_up(db, healthy), timeout=20)
        wait_until(lambda: (trainer(db, damaged).faults or 0) >= 2, timeout=20)
    row = trainer(db, damaged)
    assert row.fault and row.retry_at and row.error is None
    assert len(fault_lines(caplog, damaged)) == row.faults
    assert not [r for r in caplog.records if "database unavailable" in r.getMessage()]
    db.engine.dispose()
