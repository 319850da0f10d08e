"""Two workers on one PostgreSQL share models by row leases: one writer per
model at a time, and a dead worker's models pass to the other once its lease
runs out (docs/architecture.md, "Scale-out"; PostgreSQL's FOR UPDATE SKIP
LOCKED)."""

from __future__ import annotations

import signal
from pathlib import Path

import numpy as np
from sqlalchemy import text
from sqlalchemy.engine import make_url

from engine import Learner
from service.store.database import Database
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
    versions,
    wait_until,
)

LEASE = 4.0
FIELDS = ["a", "b"]


def records(n: int, seed: int) -> list[dict]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2))
    return [{"features": {"a": float(a), "b": float(b)}, "label": bool(a * b > 0)}
            for a, b in X]


def named(url: str, worker_id: str) -> str:
    """``url`` with the PostgreSQL application_name set to ``worker_id``."""
    return make_url(url).update_query_dict({"application_name": worker_id}).render_as_string(
        hide_password=False)


def sessions_of(db: Database, worker_id: str) -> int:
    with db.engine.connect() as connection:
        return int(connection.execute(text(
            "SELECT count(*) FROM pg_stat_activity WHERE datname = current_database() "
            "AND application_name = :name"), {"name": worker_id}).scalar_one())


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
    # Each worker's connections carry its id, so the test can see them go.
    workers = {wid: start_worker_process(named(postgres_url, wid), wid,
                                         tmp_path / f"{wid}.log", **settings)
               for wid in ("w1", "w2")}
    try:
        for k, name in enumerate(names):
            send(db, name, records(600, seed=k))
        wait_until(lambda: all(trainer(db, m).leased_by for m in ids), timeout=120)
        holders = {m: trainer(db, m).leased_by for m in ids}
        assert set(holders.values()) <= {"w1", "w2"}

        victim = max(("w1", "w2"), key=lambda w: list(holders.values()).count(w))
        survivor = "w2" if victim == "w1" else "w1"
        # The survivor paused, so it can take nothing over while the dead
        # worker's last lease times are read; the dead worker's connections
        # gone, so no renewal of its can still commit after the read.
        workers[survivor].send_signal(signal.SIGSTOP)
        try:
            workers[victim].send_signal(signal.SIGKILL)
            workers[victim].wait(30)
            wait_until(lambda: not sessions_of(db, victim), timeout=120)
            orphaned = {m for m in ids if trainer(db, m).leased_by == victim}
            expiries = {m: trainer(db, m).lease_expires_at for m in orphaned}
            written = {m: {v.id for v in versions(db, m)} for m in orphaned}
        finally:
            workers[survivor].send_signal(signal.SIGCONT)
        assert orphaned, holders
        for k, name in enumerate(names):
            send(db, name, records(600, seed=10 + k))
        wait_until(lambda: all(trainer(db, m).leased_by == survivor for m in ids), timeout=120)
        wait_until(lambda: all(caught_up(db, m) for m in ids), timeout=120)
    finally:
        statuses = {wid: stop_process(process) for wid, process in workers.items()}
    assert statuses == {victim: -signal.SIGKILL, survivor: 0}
    for model_id in orphaned:
        # Nobody wrote to the dead worker's models before its lease ran out:
        # the survivor's versions of them all came after it expired (one
        # machine, one clock for both stamps).
        taken_over = [v for v in versions(db, model_id) if v.id not in written[model_id]]
        assert taken_over, model_id
        assert min(v.created_at for v in taken_over) > expiries[model_id]
    for model_id in ids:
        chain = assert_one_chain(db, model_id)  # one writer at a time: one unbroken chain
        assert chain[-1].records_seen == model_row(db, model_id).records_train
        assert_same_state(Learner.from_bytes(chain[-1].snapshot), uninterrupted(db, model_id))
    db.engine.dispose()
