"""A worker killed with SIGKILL in the middle of writing a version.

tests/worker/test_crash_replay.py kills the worker at random moments, which
mostly land between checkpoints. Here the kill lands *inside* the version's
transaction, every time: a test-only trigger stalls every version insert
while the versions are held (tests/worker/hold.py), the test waits until the
worker is inside that stall, and kills it. No torn version may be left (the
version count, the trainer's head and cursor stay where the last committed
version put them, every stored snapshot loads), and after kills
mid-checkpoint and at random moments the final weights equal, bit for bit,
one uninterrupted pass of the engine over the same records (docs/architecture.md,
invariant 2; the check is common practice, no source).

Between the stalled kills the worker makes progress and is killed at a
random moment; the versions beyond a cursor short of the end stay held
meanwhile, so however fast the engine gets, the stream is never finished
before the next stalled kill (which needs a version left to write).
"""

from __future__ import annotations

import random
import signal
import subprocess
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from sqlalchemy import func, select

from engine import Learner
from service.store.database import Database
from service.store.tables import RecordRow
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
from tests.worker.hold import end_orphans, hold, inside_hold, install_hold, release

pytestmark = pytest.mark.slow
FIELDS = [f"x{i}" for i in range(6)]
STALLED_KILLS = 3


def stream(n: int, seed: int) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, len(FIELDS)))
    labels = (X @ rng.normal(size=len(FIELDS)) + 0.3 * rng.normal(size=n)) > 0
    return [{"features": dict(zip(FIELDS, map(float, row), strict=True)), "label": bool(y)}
            for row, y in zip(X, labels, strict=True)]


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
    with db.read() as session:
        last_seq = session.scalar(select(func.max(RecordRow.seq)))
    install_hold(db, "versions", "cursor")
    log = tmp_path / "worker.log"
    chance = random.Random(20261202)

    def start() -> subprocess.Popen[bytes]:
        # Returns once the worker is running (its start line is written).
        return start_worker_process(database_url, "stall-worker", log,
                                    KEELSON_WORKER_CHUNK_RECORDS="50",
                                    KEELSON_WORKER_LEASE_SECONDS="30")

    stalled = 0
    for _round in range(STALLED_KILLS):
        # Kill inside the version transaction: every version insert stalls.
        before = committed_state(db, model_id)
        hold(db, beyond=before[2])
        process = start()
        try:
            wait_until(lambda: inside_hold(db), timeout=120, every=0.05)
            stalled += 1
        finally:
            process.send_signal(signal.SIGKILL)
            process.wait(30)
        end_orphans(db)
        assert committed_state(db, model_id) == before  # the stalled version is not there
        for version in versions(db, model_id):
            Learner.from_bytes(version.snapshot)  # every stored snapshot is whole
        # Then some progress (at least one version of its own), and a kill at
        # a random moment; versions beyond a point well short of the end stay
        # held, so a version is left to stall in the next round. 400 records
        # hold at least one count boundary (150 train records, about 190);
        # three rounds of at most 800 stop short of 3000.
        limit = before[2] + chance.randint(400, 800)
        hold(db, beyond=limit)
        process = start()
        try:
            wait_until(lambda b=before[2]: trainer(db, model_id).cursor > b, timeout=120)
            time.sleep(chance.uniform(0.0, 0.5))
        finally:
            process.send_signal(signal.SIGKILL)
            process.wait(30)
        end_orphans(db)
        assert before[2] < trainer(db, model_id).cursor <= limit < last_seq
    assert stalled == STALLED_KILLS

    release(db)
    process = start()
    try:
        wait_until(lambda: caught_up(db, model_id), timeout=120)
    finally:
        status = stop_process(process)
    assert status == 0, log.read_text()[-3000:]
    assert trainer(db, model_id).error is None
    chain = assert_one_chain(db, model_id)
    assert len(chain) >= STALLED_KILLS
    assert_same_state(Learner.from_bytes(chain[-1].snapshot), uninterrupted(db, model_id))
    db.engine.dispose()
