"""A worker killed with SIGKILL in the middle of a model's delete job.

A test-only trigger stalls the delete of every record beyond a point
(tests/worker/hold.py, ``on="DELETE"``), so the kill lands inside a batch's
transaction, every time, after earlier batches committed: the model is then
half removed. The next worker (once the dead one's lease on the job ran out)
finishes the job: nothing of the model is left but its tombstone row, its
stopped trainer row and the job, which ends succeeded. Common practice, no
source.
"""

from __future__ import annotations

import signal
from pathlib import Path

import pytest
from sqlalchemy import func, select

from service.store.database import Database
from service.store.tables import JobRow, RecordRow, VersionRow
from service.usecases.deletion import request_delete
from tests.worker.helpers import (
    database,
    new_model,
    numeric_spec,
    send,
    start_worker_process,
    stop_process,
    wait_until,
)
from tests.worker.hold import end_orphans, hold, inside_hold, install_hold, release

pytestmark = pytest.mark.slow
FIELDS = ["flow", "pressure"]
RECORDS = 3000


def records_of(db: Database, model_id: int) -> int:
    with db.read() as session:
        return int(session.scalar(select(func.count()).select_from(RecordRow)
                                  .where(RecordRow.model_id == model_id)) or 0)


def job(db: Database, job_id: int) -> JobRow:
    with db.read() as session:
        return session.get_one(JobRow, job_id)


def test_a_worker_killed_inside_a_delete_leaves_what_the_next_one_finishes(
        database_url: str, tmp_path: Path) -> None:
    db = database(database_url)
    model_id = new_model(db, numeric_spec("retired-station", FIELDS))
    send(db, "retired-station", [
        {"features": {"flow": float(i % 17), "pressure": float(i % 5)}, "label": i % 3 == 0}
        for i in range(RECORDS)])
    keep = new_model(db, numeric_spec("lift-station", FIELDS))
    send(db, "lift-station", [{"features": {"flow": 1.0, "pressure": 2.0}, "label": True}])
    with db.read() as session:
        seqs = list(session.scalars(select(RecordRow.seq).where(RecordRow.model_id == model_id)
                                    .order_by(RecordRow.seq)))
    job_id = request_delete(db, "retired-station")["id"]
    install_hold(db, "records", "seq", on="DELETE")
    # Batches take the lowest sequences first on both databases (the
    # (model_id, seq) index): the ones past the middle stall.
    hold(db, beyond=seqs[RECORDS // 2])
    log = tmp_path / "worker.log"
    settings = {"KEELSON_WORKER_DELETE_BATCH": "100", "KEELSON_WORKER_LEASE_SECONDS": "3"}
    process = start_worker_process(database_url, "doomed-worker", log, **settings)
    try:
        wait_until(lambda: inside_hold(db), timeout=120, every=0.05)
    finally:
        process.send_signal(signal.SIGKILL)
        process.wait(30)
    end_orphans(db)
    left = records_of(db, model_id)
    assert 0 < left < RECORDS  # half removed: earlier batches committed, the stalled one not
    assert job(db, job_id).status == "running"
    release(db)
    process = start_worker_process(database_url, "next-worker", log, **settings)
    try:
        wait_until(lambda: job(db, job_id).status == "succeeded", timeout=120)
    finally:
        status = stop_process(process)
    assert status == 0, log.read_text()[-3000:]
    finished = job(db, job_id)
    assert (finished.attempts, finished.error) == (2, None)
    assert finished.progress is not None
    assert finished.progress["records_total"] == finished.progress["records_deleted"] == RECORDS
    assert records_of(db, model_id) == 0
    with db.read() as session:
        assert session.scalar(select(func.count()).select_from(VersionRow).where(
            VersionRow.model_id == model_id)) == 0
    assert records_of(db, keep) == 1
    db.engine.dispose()
