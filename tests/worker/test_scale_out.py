"""Two workers on one PostgreSQL share models by row leases: one writer per
model at a time, and a dead worker's models pass to the other once its lease
runs out (docs/architecture.md, "Scale-out"; PostgreSQL's FOR UPDATE SKIP
LOCKED)."""

from __future__ import annotations

import signal
import time
from pathlib import Path

import numpy as np

from engine import Learner
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

LEASE = 4.0
FIELDS = ["a", "b"]


def records(n: int, seed: int) -> list[dict]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2))
    return [{"features": {"a": float(a), "b": float(b)}, "label": bool(a * b > 0)}
            for a, b in X]


def test_two_workers_split_models_and_a_dead_ones_models_pass_to_the_other(
    postgres_url: str, tmp_path: Path
) -> None:
    db = database(postgres_url)
    names = [f"station-{i}" for i in range(4)]
    ids = [new_model(db, numeric_spec(name, FIELDS, hidden_layers=[6],
                                      training={"checkpoint_every": 200,
                                                "warmup_records": 32}))
           for name in names]
    settings = {"KEELSON_WORKER_LEASE_SECONDS": str(LEASE),
                "KEELSON_WORKER_CHUNK_RECORDS": "20"}
    workers = {wid: start_worker_process(postgres_url, wid, tmp_path / f"{wid}.log", **settings)
               for wid in ("w1", "w2")}
    try:
        for k, name in enumerate(names):
            send(db, name, records(600, seed=k))
        wait_until(lambda: all(trainer(db, m).leased_by for m in ids), timeout=30)
        holders = {m: trainer(db, m).leased_by for m in ids}
        assert set(holders.values()) <= {"w1", "w2"}

        victim = max(("w1", "w2"), key=lambda w: list(holders.values()).count(w))
        survivor = "w2" if victim == "w1" else "w1"
        workers[victim].send_signal(signal.SIGKILL)
        workers[victim].wait(10)
        # Its last heartbeat renewed the lease at most LEASE / 3 ago: for a while
        # yet its models stay with it, and nobody else writes to them.
        time.sleep(0.2)
        assert {m for m in ids if trainer(db, m).leased_by == victim} == \
            {m for m, w in holders.items() if w == victim}
        for k, name in enumerate(names):
            send(db, name, records(600, seed=10 + k))
        wait_until(lambda: all(trainer(db, m).leased_by == survivor for m in ids), timeout=30)
        wait_until(lambda: all(caught_up(db, m) for m in ids), timeout=40)
    finally:
        for process in workers.values():
            stop_process(process)
    for model_id in ids:
        chain = assert_one_chain(db, model_id)  # one writer at a time: one unbroken chain
        assert chain[-1].records_seen == model_row(db, model_id).records_train
        assert_same_state(Learner.from_bytes(chain[-1].snapshot), uninterrupted(db, model_id))
    db.engine.dispose()
