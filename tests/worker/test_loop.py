"""The worker process as a whole: stopping cleanly on SIGTERM, start-up included."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

from engine import Learner
from service.process import block_stop_signals
from tests.worker.helpers import (
    ROOT,
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
    """The whole stream is one chunk (chunk size above its length) with count
    boundaries at 1000 and 2000 train records. The version at 1000 is written
    inside the step that applies that chunk, so once the test sees it, the
    worker is in that step, or past it; a SIGTERM from then on finishes the
    step (every record applied) and writes the rest (the train records past
    2000) as the stop's version. No idle version can come first (60 s)."""
    db = database(database_url)
    spec = numeric_spec("sigterm", ["a", "b"], hidden_layers=[8],
                        training={"checkpoint_every": 1000, "warmup_records": 64})
    model_id = new_model(db, spec)
    send(db, "sigterm", xor_records(3000, seed=9))
    train = model_row(db, model_id).records_train
    assert 2000 < train < 3000  # two count boundaries, then a tail only a stop writes
    log = tmp_path / "worker.log"
    settings = {"KEELSON_WORKER_CHUNK_RECORDS": "5000", "KEELSON_WORKER_IDLE_SECONDS": "60"}
    process = start_worker_process(database_url, "polite", log, **settings)
    try:
        wait_until(lambda: versions(db, model_id), timeout=120)  # inside the step, or past it
    finally:
        status = stop_process(process, signal.SIGTERM)
    assert status == 0, log.read_text()[-3000:]
    stopped = versions(db, model_id)
    state = trainer(db, model_id)
    assert [v.records_seen for v in stopped] == [1000, 2000, train]
    assert state.leased_by is None
    assert stopped[-1].cursor == state.cursor and state.head_version_id == stopped[-1].id
    assert caught_up(db, model_id)

    # Records that came after the stop: the next worker carries on from the
    # stop's version to the same weights as one pass over everything.
    send(db, "sigterm", xor_records(1000, seed=10))
    process = start_worker_process(database_url, "successor", log,
                                   KEELSON_WORKER_CHUNK_RECORDS="25")
    try:
        wait_until(lambda: trainer(db, model_id).leased_by == "successor", timeout=120)
        wait_until(lambda: caught_up(db, model_id), timeout=120)
    finally:
        status = stop_process(process, signal.SIGTERM)
    assert status == 0, log.read_text()[-3000:]
    chain = assert_one_chain(db, model_id)
    assert chain[-1].records_seen == model_row(db, model_id).records_train
    assert_same_state(Learner.from_bytes(chain[-1].snapshot), uninterrupted(db, model_id))
    db.engine.dispose()


def stop_sent_before_start() -> None:
    """In the child, before exec: SIGTERM and SIGINT blocked, as ``keelson
    serve`` starts its worker, and a SIGTERM sent at once. It stays pending
    across exec until the worker's handler is in place (service/process.py)."""
    block_stop_signals()
    os.kill(os.getpid(), signal.SIGTERM)


def test_a_stop_sent_before_the_worker_ran_any_code_is_a_clean_exit(
    database_url: str, tmp_path: Path
) -> None:
    """``keelson worker`` stops cleanly on SIGTERM at any moment, start-up
    included: exit status 0, nothing leased, nothing written."""
    db = database(database_url)
    model_id = new_model(db, numeric_spec("early-stop", ["a", "b"], hidden_layers=[4],
                                          training={"warmup_records": 16}))
    send(db, "early-stop", xor_records(100, seed=1))
    log = tmp_path / "worker.log"
    env = {**os.environ, "KEELSON_DATABASE_URL": database_url, "PYTHONPATH": str(ROOT)}
    with log.open("wb") as out:
        process = subprocess.Popen(
            [sys.executable, "-m", "service", "worker", "--id", "early"], cwd=ROOT, env=env,
            stdout=out, stderr=subprocess.STDOUT, preexec_fn=stop_sent_before_start)
    assert process.wait(120) == 0, log.read_text()[-3000:]
    assert "worker early: stopped while starting; nothing to do" in log.read_text()
    assert versions(db, model_id) == []
    assert trainer(db, model_id).leased_by is None
    db.engine.dispose()
