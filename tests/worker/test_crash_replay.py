"""A worker killed with SIGKILL at random moments, again and again, ends with
the same weights, bit for bit, as one uninterrupted pass over the records.

The uninterrupted pass is the engine itself: a learner made from the same spec
and warm-up records that learns every train record once, in sequence order.
Equality of every parameter's bits, of the optimizer state and of the
prequential sums means each train record was applied exactly once, in order
(docs/architecture.md, invariants 1 and 2; the check is common practice, no source).

The scenario is deterministic by construction: all records are stored before
the first worker starts, so versions fall on count boundaries only (no idle
version can happen mid-stream), and whatever is killed is redone from the last
version. The restarted worker keeps its id (as `keelson worker --id` does),
so it takes its own lease back at once instead of waiting for it to expire.

The kills land mid-stream however fast the engine is: before each run, the
versions beyond a random cursor short of the end are held (tests/worker/
hold.py), so a run can never finish the stream. Each run is killed at a random
moment after its first version of its own; a run that reached the hold by
then is killed inside that held version write.
"""

from __future__ import annotations

import random
import signal
import subprocess
import time
from pathlib import Path

import numpy as np
from sqlalchemy import select

from engine import Learner
from service.store.tables import RecordRow
from tests.worker.helpers import (
    assert_one_chain,
    assert_same_state,
    caught_up,
    database,
    model_row,
    new_model,
    numeric_spec,
    send,
    start_worker_process,
    stop_process,
    trainer,
    uninterrupted,
    wait_until,
)
from tests.worker.hold import end_orphans, hold, install_hold, release

FIELDS = [f"x{i}" for i in range(8)]


def stream(n: int, seed: int) -> list[dict]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, len(FIELDS)))
    direction = rng.normal(size=len(FIELDS))
    labels = (X @ direction + 0.5 * rng.normal(size=n)) > 0
    return [{"features": dict(zip(FIELDS, map(float, row), strict=True)), "label": bool(y)}
            for row, y in zip(X, labels, strict=True)]


def start_worker(url: str, log: Path) -> subprocess.Popen[bytes]:
    # A long lease: the restarted worker takes its own lease back by id.
    return start_worker_process(url, "crash-worker", log, KEELSON_WORKER_CHUNK_RECORDS="40",
                                KEELSON_WORKER_LEASE_SECONDS="30")


def test_a_worker_killed_at_random_moments_reaches_bit_identical_weights(
    database_url: str, tmp_path: Path
) -> None:
    db = database(database_url)
    spec = numeric_spec("crashes", FIELDS, hidden_layers=[16, 8],
                        training={"optimizer": "adam", "learning_rate": 0.003,
                                  "checkpoint_every": 100, "warmup_records": 128})
    model_id = new_model(db, spec)
    send(db, "crashes", stream(12000, seed=11))
    with db.read() as session:
        last_seq = session.scalar(select(RecordRow.seq).where(RecordRow.model_id == model_id)
                                  .order_by(RecordRow.seq.desc()).limit(1))
    install_hold(db, "versions", "cursor")
    log = tmp_path / "worker.log"
    chance = random.Random(20261201)
    cursors, limits = [], []
    for _kill in range(5):
        before = trainer(db, model_id).cursor
        # 400 records hold at least two count boundaries (100 train records
        # each, about 125 records); 5 runs of at most 1400 stop short of 12000.
        limit = before + chance.randint(400, 1400)
        hold(db, beyond=limit)
        process = start_worker(database_url, log)  # running: its start line is written
        try:
            wait_until(lambda b=before: trainer(db, model_id).cursor > b, timeout=120)
            time.sleep(chance.uniform(0.0, 0.3))
        finally:
            process.send_signal(signal.SIGKILL)
            process.wait(30)
        end_orphans(db)
        cursors.append(trainer(db, model_id).cursor)
        limits.append(limit)
        assert before < cursors[-1] <= limit, (before, cursors, limits)
    print("cursors after each kill:", cursors, "held beyond", limits, "of", last_seq)
    # Every kill landed mid-stream, after progress of its own: the test means something.
    assert all(0 < cursor < last_seq for cursor in cursors), cursors
    assert cursors == sorted(cursors)  # a version, once written, is never lost

    release(db)
    process = start_worker(database_url, log)
    try:
        wait_until(lambda: caught_up(db, model_id), timeout=120)
    finally:
        status = stop_process(process)
    assert status == 0, log.read_text()[-3000:]
    assert trainer(db, model_id).error is None

    chain = assert_one_chain(db, model_id)
    resumed = Learner.from_bytes(chain[-1].snapshot)
    assert chain[-1].records_seen == model_row(db, model_id).records_train
    assert_same_state(resumed, uninterrupted(db, model_id))
    db.engine.dispose()
