"""Retrain jobs: queued -> running with progress -> succeeded with a version;
failures recorded; a promoted retrain heads the online lineage; rollback."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from sqlalchemy import func, select

from engine import Learner
from service.store.tables import RecordRow
from service.usecases.jobs import get_job, request_retrain
from service.usecases.versions import list_versions, promote_version
from service.worker import retrain as retrain_module
from service.worker.leasing import claim_job
from service.worker.retrain import run_retrain
from service.worker.settings import WorkerSettings
from tests.worker.helpers import (
    assert_trained_exactly_once,
    caught_up,
    database,
    model_row,
    new_model,
    numeric_spec,
    send,
    trainer,
    versions,
    wait_until,
    worker_thread,
)

FIELDS = ["a", "b", "c"]


def records(n: int, seed: int) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3))
    y = X @ np.array([1.0, -2.0, 0.5]) + 0.3 * rng.normal(size=n) > 0
    return [{"features": dict(zip(FIELDS, map(float, row), strict=True)), "label": bool(t)}
            for row, t in zip(X, y, strict=True)]


def spec(name: str, promotion: str = "auto") -> dict[str, Any]:
    return numeric_spec(name, FIELDS, hidden_layers=[8], promotion=promotion,
                        training={"max_epochs": 15, "patience": 100, "checkpoint_every": 500})


def test_a_job_runs_from_queued_to_succeeded_reporting_progress_on_the_way(
    database_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    db = database(database_url)
    model_id = new_model(db, spec("lifecycle"))
    send(db, "lifecycle", records(1200, seed=1))
    job = request_retrain(db, "lifecycle", warm_start=False)
    assert job["status"] == "queued"
    with db.write() as session, session.begin():
        claimed = claim_job(session, "direct", 30)
        assert claimed is not None and claimed.id == job["id"]
    seen: list[tuple[str, dict[str, Any]]] = []
    report = retrain_module.report_progress

    def recording(writes, job_id, worker_id, progress):  # type: ignore[no-untyped-def]
        stored = report(writes, job_id, worker_id, progress)
        seen.append((get_job(db, job_id)["status"], get_job(db, job_id)["progress"]))
        return stored

    monkeypatch.setattr(retrain_module, "report_progress", recording)
    settings = WorkerSettings(database_url=database_url, progress_seconds=0.0)
    version = run_retrain(settings, db.read, db.write, job["id"], "direct")

    epochs = [progress["epoch"] for _, progress in seen]
    assert {status for status, _ in seen} == {"running"}
    assert epochs == sorted(epochs) and len(epochs) >= 2 and epochs[-1] >= 2
    assert all(set(p) >= {"epoch", "loss", "validation_metric"} for _, p in seen)
    done = get_job(db, job["id"])
    assert done["status"] == "succeeded" and done["error"] is None
    assert done["version"] == version.number
    stored = versions(db, model_id)[-1]
    assert (stored.origin, stored.job_id, stored.status) == ("retrain", job["id"], "active")
    assert stored.metrics["holdout"]["n"] == model_row(db, model_id).records_holdout
    # The version's cursor is the last record the retrain saw; the fit report is kept.
    assert stored.cursor == trainer(db, model_id).cursor
    assert stored.metrics["fit"]["epochs"] == epochs[-1]
    db.engine.dispose()


def test_a_job_with_nothing_to_train_on_fails_with_its_reason(database_url: str) -> None:
    db = database(database_url)
    new_model(db, spec("empty"))
    job = request_retrain(db, "empty", warm_start=False)
    with worker_thread(database_url):
        wait_until(lambda: get_job(db, job["id"])["status"] == "failed")
    failed = get_job(db, job["id"])
    assert "no train records" in failed["error"] and failed["version"] is None
    db.engine.dispose()


def test_a_promoted_retrain_heads_the_lineage_and_online_learning_continues_after_it(
    database_url: str,
) -> None:
    db = database(database_url)
    model_id = new_model(db, spec("handover"))
    send(db, "handover", records(1500, seed=2))
    with worker_thread(database_url):
        wait_until(lambda: caught_up(db, model_id))
        online_head = trainer(db, model_id).head_version_id
        active_before = model_row(db, model_id).active_version_id
        job = request_retrain(db, "handover", warm_start=True)
        wait_until(lambda: get_job(db, job["id"])["status"] == "succeeded", timeout=120)
        retrained = next(v for v in versions(db, model_id) if v.origin == "retrain")
        # A warm start continues from the active version.
        assert retrained.parent_id == active_before is not None
        send(db, "handover", records(700, seed=3))
        wait_until(lambda: caught_up(db, model_id) and
                   versions(db, model_id)[-1].number > retrained.number)
    assert retrained.status == "active"
    assert trainer(db, model_id).head_version_id not in (online_head, None)
    later = [v for v in versions(db, model_id) if v.number > retrained.number]
    assert later[0].parent_id == retrained.id
    assert all(v.parent_id == p.id for p, v in zip(later, later[1:], strict=False))
    child = later[-1]
    assert child.origin == "online" and child.cursor > retrained.cursor
    parent, resumed = Learner.from_bytes(retrained.snapshot), Learner.from_bytes(child.snapshot)
    with db.read() as session:
        n_new = session.scalar(select(func.count()).where(
            RecordRow.model_id == model_id, RecordRow.split == "train",
            RecordRow.seq > retrained.cursor, RecordRow.seq <= child.cursor))
    assert resumed.records_seen == parent.records_seen + n_new
    # A version counts every train record its weights learned from, batch or online.
    with db.read() as session:
        n_upto = session.scalar(select(func.count()).where(
            RecordRow.model_id == model_id, RecordRow.split == "train",
            RecordRow.seq <= retrained.cursor))
    assert (retrained.records_seen, child.records_seen) == (n_upto, n_upto + n_new)
    # Beyond the counts: the child's weights are the retrain's snapshot plus
    # each later train record learned once, in order, bit for bit.
    assert trainer(db, model_id).head_version_id == child.id
    assert_trained_exactly_once(db, model_id)
    db.engine.dispose()


def test_rolling_back_promotes_an_older_version_and_retires_the_newer(database_url: str) -> None:
    db = database(database_url)
    model_id = new_model(db, spec("rollback", promotion="manual"))
    send(db, "rollback", records(1600, seed=4))
    with worker_thread(database_url):
        wait_until(lambda: caught_up(db, model_id) and len(versions(db, model_id)) >= 3)
    listed, _ = list_versions(db, "rollback", limit=100)
    assert {v["status"] for v in listed} == {"candidate"}  # manual: nothing promoted alone
    newest, oldest = max(v["number"] for v in listed), min(v["number"] for v in listed)
    promote_version(db, "rollback", newest)
    promote_version(db, "rollback", oldest)
    after = {v["number"]: v["status"] for v in list_versions(db, "rollback", limit=100)[0]}
    assert after[oldest] == "active" and after[newest] == "retired"
    assert list(after.values()).count("active") == 1
    assert model_row(db, model_id).active_version_id == versions(db, model_id)[0].id
    # Rolling back changes what is served, not where the lineage learns from.
    assert trainer(db, model_id).head_version_id == versions(db, model_id)[-1].id
    db.engine.dispose()
