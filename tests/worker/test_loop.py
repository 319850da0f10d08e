"""The worker process as a whole: stopping cleanly on SIGTERM."""

from __future__ import annotations

import signal
import time
from pathlib import Path

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
    versions,
    wait_until,
)
from tests.worker.test_online import xor_records


def test_sigterm_finishes_the_step_writes_what_was_applied_and_frees_the_lease(
    database_url: str, tmp_path: Path
) -> None:
    db = database(database_url)
    spec = numeric_spec("sigterm", ["a", "b"], hidden_layers=[8],
                        training={"checkpoint_every": 100_000, "warmup_records": 64})
    model_id = new_model(db, spec)
    send(db, "sigterm", xor_records(3000, seed=9))
    log = tmp_path / "worker.log"
    # No count boundary and no idle pause can write a version here: only the stop can.
    settings = {"KEELSON_WORKER_CHUNK_RECORDS": "25", "KEELSON_WORKER_IDLE_SECONDS": "60"}
    process = start_worker_process(database_url, "polite", log, **settings)
    wait_until(lambda: "network created" in log.read_text(), timeout=30)
    time.sleep(0.3)  # the stream under way: chunks take milliseconds
    assert stop_process(process, signal.SIGTERM) == 0
    stopped = versions(db, model_id)
    state = trainer(db, model_id)
    assert len(stopped) == 1 and state.leased_by is None
    assert stopped[0].cursor == state.cursor and state.head_version_id == stopped[0].id
    assert 0 < stopped[0].records_seen <= model_row(db, model_id).records_train

    # The next worker carries on from that version to the same weights as one pass.
    process = start_worker_process(database_url, "successor", log,
                                   KEELSON_WORKER_CHUNK_RECORDS="25")
    try:
        wait_until(lambda: trainer(db, model_id).leased_by == "successor", timeout=30)
        wait_until(lambda: caught_up(db, model_id), timeout=40)
    finally:
        assert stop_process(process, signal.SIGTERM) == 0
    chain = assert_one_chain(db, model_id)
    assert chain[-1].records_seen == model_row(db, model_id).records_train
    assert_same_state(Learner.from_bytes(chain[-1].snapshot), uninterrupted(db, model_id))
    db.engine.dispose()
