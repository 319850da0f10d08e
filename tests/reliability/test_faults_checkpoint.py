"""A worker killed with SIGKILL in the middle of writing a version.

tests/worker/test_crash_replay.py kills the worker at random moments, which
mostly land between checkpoints. Here the kill lands *inside* the version's
transaction, every time: a test-only trigger on ``versions`` stalls the insert
while a flag row exists (PostgreSQL: ``pg_sleep``; SQLite: a large cross
join), the test waits until the worker is inside that stall (PostgreSQL:
``pg_stat_activity`` shows the sleep; SQLite: the write lock stays taken), and
kills it. No torn version may be left (the version count, the trainer's head
and cursor stay where the last committed version put them, every stored
snapshot loads), and after kills mid-checkpoint and at random moments the
final weights equal, bit for bit, one uninterrupted pass of the engine over
the same records (docs/architecture.md, invariant 2; the check is common practice, no
source).
"""

from __future__ import annotations

import random
import signal
import sqlite3
import subprocess
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sqlalchemy import text
from sqlalchemy.engine import make_url

from engine import Learner
from service.store.database import Database
from tests.worker.helpers import (
    assert_one_chain,
    assert_same_state,
    caught_up,
    database,
    new_model,
    numeric_spec,
    send,
    start_worker_process,
    stop_process,
    trainer,
    uninterrupted,
    versions,
    wait_until,
)

pytestmark = pytest.mark.slow
FIELDS = [f"x{i}" for i in range(6)]
STALLED_KILLS = 3

POSTGRES_STALL = [
    "CREATE TABLE reliability_stall (on_ integer)",
    """CREATE FUNCTION reliability_stall_insert() RETURNS trigger AS $$
       BEGIN
         IF EXISTS (SELECT 1 FROM reliability_stall) THEN PERFORM pg_sleep(30); END IF;
         RETURN NEW;
       END $$ LANGUAGE plpgsql""",
    """CREATE TRIGGER reliability_stall AFTER INSERT ON versions
       FOR EACH ROW EXECUTE FUNCTION reliability_stall_insert()""",
]
# SQLite has no sleep; a cross join of 320^4 rows takes minutes (320^3 took
# under a second on an idle machine: the version committed before the kill).
# The worker is killed inside it. Trigger bodies may hold SELECT statements
# (SQLite docs, CREATE TRIGGER).
SQLITE_STALL = [
    "CREATE TABLE reliability_stall (on_ integer)",
    "CREATE TABLE reliability_rows (n integer)",
    "WITH RECURSIVE c(n) AS (SELECT 1 UNION ALL SELECT n + 1 FROM c WHERE n < 320) "
    "INSERT INTO reliability_rows SELECT n FROM c",
    """CREATE TRIGGER reliability_stall AFTER INSERT ON versions
       WHEN EXISTS (SELECT 1 FROM reliability_stall)
       BEGIN SELECT count(*) FROM reliability_rows a, reliability_rows b, reliability_rows c,
                                reliability_rows d;
       END""",
]


def stream(n: int, seed: int) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, len(FIELDS)))
    labels = (X @ rng.normal(size=len(FIELDS)) + 0.3 * rng.normal(size=n)) > 0
    return [{"features": dict(zip(FIELDS, map(float, row), strict=True)), "label": bool(y)}
            for row, y in zip(X, labels, strict=True)]


def in_stall(url: str, db: Database) -> bool:
    """True while a version insert is held inside the stalling trigger."""
    if make_url(url).get_backend_name() == "postgresql":
        with db.engine.connect() as connection:
            return bool(connection.execute(text(
                "SELECT count(*) FROM pg_stat_activity WHERE datname = current_database() "
                "AND wait_event = 'PgSleep'")).scalar())
    # SQLite: a writer holds the lock when BEGIN IMMEDIATE fails at once; only
    # the stalled insert holds it for long, so ask twice, 0.2 s apart.
    for _ in range(2):
        probe = sqlite3.connect(make_url(url).database, timeout=0, isolation_level=None)
        try:
            probe.execute("BEGIN IMMEDIATE")
            probe.execute("ROLLBACK")
            return False
        except sqlite3.OperationalError:
            pass
        finally:
            probe.close()
        time.sleep(0.2)
    return True


def set_stall(db: Database, on: bool) -> None:
    with db.engine.begin() as connection:
        connection.execute(text("DELETE FROM reliability_stall"))
        if on:
            connection.execute(text("INSERT INTO reliability_stall VALUES (1)"))


def end_orphans(url: str, db: Database) -> None:
    """A killed client's PostgreSQL backend sleeps on with its locks until the
    server notices; end it, as the server would."""
    if make_url(url).get_backend_name() == "postgresql":
        with db.engine.connect() as connection:
            connection.execute(text(
                "SELECT pg_terminate_backend(pid) FROM pg_stat_activity "
                "WHERE datname = current_database() AND pid <> pg_backend_pid()"))


def committed_state(db: Database, model_id: int) -> tuple[int, int | None, int]:
    row = trainer(db, model_id)
    return len(versions(db, model_id)), row.head_version_id, row.cursor


def test_a_worker_killed_inside_a_version_write_leaves_no_torn_version(
    database_url: str, tmp_path: Path
) -> None:
    db = database(database_url)
    spec = numeric_spec("mid-checkpoint", FIELDS, hidden_layers=[12, 6],
                        training={"optimizer": "adam", "learning_rate": 0.003,
                                  "checkpoint_every": 150, "warmup_records": 64})
    model_id = new_model(db, spec)
    send(db, "mid-checkpoint", stream(3000, seed=5))
    with db.engine.begin() as connection:
        for statement in (POSTGRES_STALL if database_url.startswith("postgresql")
                          else SQLITE_STALL):
            connection.execute(text(statement))
    log = tmp_path / "worker.log"
    chance = random.Random(20261202)

    def start() -> subprocess.Popen[bytes]:
        return start_worker_process(database_url, "stall-worker", log,
                                    KEELSON_WORKER_CHUNK_RECORDS="50",
                                    KEELSON_WORKER_LEASE_SECONDS="30")

    stalled = 0
    for _round in range(STALLED_KILLS):
        # Kill inside the version transaction.
        set_stall(db, True)
        before = committed_state(db, model_id)
        process = start()
        try:
            wait_until(lambda: in_stall(database_url, db), timeout=60, every=0.05)
            stalled += 1
        finally:
            process.send_signal(signal.SIGKILL)
            process.wait(10)
        end_orphans(database_url, db)
        assert committed_state(db, model_id) == before  # the stalled version is not there
        for version in versions(db, model_id):
            Learner.from_bytes(version.snapshot)  # every stored snapshot is whole
        # Then some progress, and a kill at a random moment.
        set_stall(db, False)
        process = start()
        try:
            time.sleep(chance.uniform(0.5, 1.5))
        finally:
            process.send_signal(signal.SIGKILL)
            process.wait(10)
        end_orphans(database_url, db)
    assert stalled == STALLED_KILLS

    process = start()
    try:
        wait_until(lambda: caught_up(db, model_id), timeout=90)
    finally:
        assert stop_process(process) == 0
    assert trainer(db, model_id).error is None
    chain = assert_one_chain(db, model_id)
    assert len(chain) >= STALLED_KILLS
    assert_same_state(Learner.from_bytes(chain[-1].snapshot), uninterrupted(db, model_id))
    db.engine.dispose()
