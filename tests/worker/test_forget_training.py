"""Training after a forget. The retrain a forget queues (?retrain=true)
trains without the forgotten records: its weights are bit for bit those of
the same retrain on a model that never had them (same spec, same remaining
records in the same order). The online lineage goes on from its head, which
learned them: every version it writes afterwards carries the mark. Common
practice, no source."""

from __future__ import annotations

from typing import Any

import numpy as np

from engine import Learner
from service.store.tables import VersionRow
from service.usecases.forgetting import forget_records
from service.worker.leasing import claim_job
from service.worker.retrain import run_retrain
from service.worker.settings import WorkerSettings
from tests.worker.helpers import (
    caught_up,
    database,
    new_model,
    numeric_spec,
    send,
    trainer,
    versions,
    wait_until,
    worker_thread,
)

FIELDS = ["flow", "pressure"]


def rows(n: int) -> list[dict[str, Any]]:
    rng = np.random.default_rng(11)
    X = rng.normal(size=(n, 2))
    return [{"key": f"station-{i}", "features": {"flow": float(a), "pressure": float(b)},
             "label": bool(a - b > 0)} for i, (a, b) in enumerate(X)]


def spec(name: str) -> dict[str, Any]:
    # holdout_fraction 0: the split hashes the model id, and the twin's id differs.
    return numeric_spec(name, FIELDS, hidden_layers=[4], training={
        "max_epochs": 5, "patience": 100, "holdout_fraction": 0.0})


def run_job(url: str, db: Any, job_id: int) -> VersionRow:
    with db.write() as session, session.begin():
        claimed = claim_job(session, "direct", 30)
        assert claimed is not None and claimed.id == job_id
    return run_retrain(WorkerSettings(database_url=url), db.read, db.write, job_id, "direct")


def test_the_queued_retrain_trains_exactly_as_if_they_had_never_been_sent(
        database_url: str) -> None:
    db = database(database_url)
    everything = rows(300)
    gone = {f"station-{i}" for i in range(0, 300, 7)}
    kept = [row for row in everything if row["key"] not in gone]
    new_model(db, spec("east-intake"))
    send(db, "east-intake", everything)
    new_model(db, spec("east-intake-twin"))
    send(db, "east-intake-twin", kept)

    answer = forget_records(db, "east-intake", sorted(gone), token="ops", reason="asked",
                            retrain=True)
    assert answer["forgotten"] == len(gone) and answer["retrain"]["status"] == "queued"
    forgotten_job = answer["retrain"]["id"]
    version = run_job(database_url, db, forgotten_job)
    assert version.records_seen == len(kept) and version.forgotten_records == 0

    from service.usecases.jobs import request_retrain
    twin_job = request_retrain(db, "east-intake-twin", warm_start=False)["id"]
    twin = run_job(database_url, db, twin_job)
    ours, theirs = Learner.from_bytes(version.snapshot), Learner.from_bytes(twin.snapshot)
    assert ours.network.params.tobytes() == theirs.network.params.tobytes()
    assert version.metrics["fit"] == twin.metrics["fit"]


def test_the_online_lineage_goes_on_and_its_later_versions_carry_the_mark(
        database_url: str) -> None:
    db = database(database_url)
    model_id = new_model(db, numeric_spec("west-intake", FIELDS, training={
        "checkpoint_every": 40, "warmup_records": 20}))
    first, later = rows(400)[:240], rows(400)[240:]
    send(db, "west-intake", first)
    with worker_thread(database_url):
        wait_until(lambda: caught_up(db, model_id), timeout=120)
        gone = [f"station-{i}" for i in range(5, 240, 30)]
        answer = forget_records(db, "west-intake", gone, token="ops", reason=None,
                                retrain=False)
        assert answer["removed"]["records"] == len(gone)
        before = {v.number for v in versions(db, model_id)}
        learned = answer["removed"]["train"]
        assert learned and answer["versions_marked_count"] == len(before)
        send(db, "west-intake", later)
        wait_until(lambda: caught_up(db, model_id)
                   and len(versions(db, model_id)) > len(before) + 2, timeout=120)
    after = [v for v in versions(db, model_id) if v.number not in before]
    assert after and all(v.origin == "online" for v in after)
    assert {v.forgotten_records for v in after} == {learned}
    assert trainer(db, model_id).leased_by is None  # stopped cleanly, lease released
