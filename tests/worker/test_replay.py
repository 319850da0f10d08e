"""``keelson replay``: a real worker trains (online with settings changed
mid-stream and a restart, retrains from scratch and warm), then the command
is run as a user runs it (click's runner, the database in the environment)
and must find every version identical; a tampered snapshot and forgotten
records must be told apart from that (exit 1 naming the parameter, exit 2)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
from click.testing import CliRunner, Result
from sqlalchemy import delete, select

from engine import snapshot
from service.config import DEFAULTS
from service.store.tables import JobRow, RecordRow, VersionRow
from service.tools.cli import cli
from service.usecases.jobs import request_retrain
from service.usecases.model_limits import ModelLimits
from service.usecases.settings import change_settings
from service.web.app import create_app
from service.web.extensions import get_database
from service.worker import replay as replay_module
from service.worker.replay_reader import ReadAhead
from tests.worker.helpers import (
    caught_up,
    database,
    new_model,
    numeric_spec,
    send,
    versions,
    wait_until,
    worker_thread,
)

LIMITS = ModelLimits.from_config(DEFAULTS)
FIELDS = ["flow", "pressure", "vibration"]


def rows(n: int, seed: int) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, len(FIELDS)))
    y = X @ np.array([1.0, -2.0, 0.5]) + 0.3 * rng.normal(size=n) > 0
    return [{"features": dict(zip(FIELDS, map(float, row), strict=True)),
             "label": "failed" if t else "ok"} for row, t in zip(X, y, strict=True)]


def pump_spec(**training: Any) -> dict[str, Any]:
    return numeric_spec("pumps", FIELDS, classes=["ok", "failed"], hidden_layers=[6],
                        training={"warmup_records": 40, "checkpoint_every": 150,
                                  "max_epochs": 8, "patience": 100, **training})


def replay(url: str, *args: str, quiet: bool = True) -> Result:
    return CliRunner().invoke(cli, ["replay", "pumps", *(["--quiet"] if quiet else []), *args],
                              env={"KEELSON_DATABASE_URL": url}, catch_exceptions=False)


def patch(url: str, body: dict[str, Any]) -> None:
    """PATCH /v1/models/pumps as an operator sends it."""
    app = create_app({"KEELSON_DATABASE_URL": url, "KEELSON_ADMIN_TOKEN": "replay-admin"})
    try:
        response = app.test_client().patch(
            "/v1/models/pumps", json=body, headers={"Authorization": "Bearer replay-admin"})
        assert response.status_code == 200, response.get_json()
    finally:
        get_database(app).engine.dispose()


def job_done(db: Any, job_id: int) -> bool:
    with db.read() as session:
        job = session.get(JobRow, job_id)
        assert job.status != "failed", job.error
        return job.status == "succeeded"


def trained_online(url: str) -> tuple[Any, int]:
    """Records learned with two settings changes (one while no worker runs,
    one over HTTP while it runs) and a worker restart between them."""
    db = database(url)
    model_id = new_model(db, pump_spec(learning_rate=0.05))
    send(db, "pumps", rows(300, seed=1))
    change_settings(db, "pumps", {"training": {"learning_rate": 0.01, "momentum": 0.5}},
                    LIMITS, token="ops", reason="a noisy month")
    send(db, "pumps", rows(200, seed=2))
    with worker_thread(url):
        wait_until(lambda: caught_up(db, model_id))
    with worker_thread(url, worker_id="second-worker"):  # starts from the stored head
        patch(url, {"training": {"learning_rate": 0.2}, "reason": "after the pump swap"})
        send(db, "pumps", rows(250, seed=3))
        wait_until(lambda: caught_up(db, model_id))
    return db, model_id


def test_every_online_version_replays_identical_with_settings_changed_mid_stream(
        database_url: str) -> None:
    db, model_id = trained_online(database_url)
    made = versions(db, model_id)
    assert len(made) >= 4
    assert len({version.settings_from_seq for version in made}) == 3  # three settings used
    result = replay(database_url, quiet=False)  # the active version, with progress
    assert result.exit_code == 0, result.output
    assert result.stdout.strip().endswith(": identical")
    # Not a terminal: the phase's label on stderr, without a bar.
    assert "version" in result.stderr and ": records " in result.stderr
    for version in (made[0], made[len(made) // 2], made[-1]):
        result = replay(database_url, "--version", str(version.number))
        assert result.exit_code == 0, result.output
        assert f"version {version.number} (online): identical" in result.output
        assert result.stderr == ""  # --quiet
    db.engine.dispose()


def test_a_long_replay_reads_ahead_in_a_second_process_to_the_same_result(
        database_url: str, monkeypatch: pytest.MonkeyPatch) -> None:
    # Every replay long enough reads, decodes and encodes in a child process
    # (service/worker/replay_reader.py); here every replay is "long enough".
    # The replay steps inline until the child is ready: here one chunk of
    # 100 records, then it waits for the child and hands over.
    monkeypatch.setattr(replay_module, "PIPELINE_MIN_RECORDS", 1)
    checks: list[bool] = []
    ready = ReadAhead.ready

    def after_one_chunk(reader: ReadAhead) -> bool:
        checks.append(True)
        if len(checks) == 1:
            return False
        reader._conn.poll(None)  # the child's "ready"
        return ready(reader)

    monkeypatch.setattr(ReadAhead, "ready", after_one_chunk)
    db, model_id = trained_online(database_url)
    for version in versions(db, model_id)[-2:]:
        checks.clear()
        result = CliRunner().invoke(
            cli, ["replay", "pumps", "--quiet", "--version", str(version.number)],
            env={"KEELSON_DATABASE_URL": database_url, "KEELSON_WORKER_CHUNK_RECORDS": "100"},
            catch_exceptions=False)
        assert result.exit_code == 0, result.output
        assert f"version {version.number} (online): identical" in result.output
        assert len(checks) == 2  # one chunk inline, then the child
    db.engine.dispose()


def test_retrain_versions_and_the_online_lineage_after_them_replay_identical(
        database_url: str) -> None:
    db = database(database_url)
    model_id = new_model(db, pump_spec())
    send(db, "pumps", rows(400, seed=4))
    with worker_thread(database_url):
        wait_until(lambda: caught_up(db, model_id))
        change_settings(db, "pumps", {"training": {"learning_rate": 0.02}}, LIMITS,
                        token="ops", reason=None)
        fresh = request_retrain(db, "pumps", warm_start=False)["id"]
        wait_until(lambda: job_done(db, fresh))
        warm = request_retrain(db, "pumps", warm_start=True)["id"]
        wait_until(lambda: job_done(db, warm))
        send(db, "pumps", rows(200, seed=5))
        wait_until(lambda: caught_up(db, model_id))
    made = versions(db, model_id)
    retrains = [version for version in made if version.origin == "retrain"]
    assert len(retrains) == 2 and retrains[1].parent_id is not None  # the warm one
    for version in retrains:
        result = replay(database_url, "--version", str(version.number))
        assert result.exit_code == 0, result.output
        assert f"version {version.number} (retrain): identical" in result.output
    after = [version for version in made if version.origin == "online"
             and version.number > retrains[0].number]
    assert after, "no online version after the retrains"
    result = replay(database_url, "--version", str(after[-1].number))
    assert result.exit_code == 0, result.output
    db.engine.dispose()


def test_a_tampered_snapshot_is_found_and_its_parameter_named(database_url: str) -> None:
    db, model_id = trained_online(database_url)
    last = versions(db, model_id)[-1]
    arrays, meta = snapshot.load(last.snapshot)
    meta = {key: value for key, value in meta.items()
            if key not in ("format", "format_version")}
    sizes = meta["sizes"]  # [3, 6, 1]: layer 1 is 4 x 6 (weights, then the bias row)
    at = 2 * sizes[1] + 5  # layer 1, input 2, unit 5
    arrays["params"][at] += 2.0 ** -40
    with db.write() as session, session.begin():
        session.get(VersionRow, last.id).snapshot = snapshot.dump(arrays, meta)
    result = replay(database_url, "--version", str(last.number))
    assert result.exit_code == 1, result.output
    assert f"params: layer 1 weights[2, 5] (flat index {at})" in result.output
    assert "differs by" in result.output
    db.engine.dispose()


def test_a_pruned_snapshot_is_rebuilt_and_stored_back_with_store(database_url: str) -> None:
    """Retention (service/worker/snapshot_retention.py) empties old snapshots of
    versions never active; --store puts the rebuilt one back, bit for bit."""
    import datetime as dt

    from engine.snapshot_diff import first_difference
    from service.worker.snapshot_retention import prune_snapshots

    db, model_id = trained_online(database_url)
    before = {v.number: bytes(v.snapshot) for v in versions(db, model_id)}
    later = dt.datetime.now(dt.UTC) + dt.timedelta(days=400)
    pruned, _ = prune_snapshots(db.write, db.read, retention_days=30, keep_last=1, now=later)
    assert pruned > 0
    gone = [v for v in versions(db, model_id) if v.snapshot is None]
    assert gone and all(v.pruned_at is not None for v in gone)
    number = str(gone[0].number)
    refused = replay(database_url, "--version", number)
    assert refused.exit_code == 3 and "--store" in refused.output, refused.output
    stored = replay(database_url, "--version", number, "--store")
    assert stored.exit_code == 0, stored.output
    assert "rebuilt from the record log and stored" in stored.output
    back = next(v for v in versions(db, model_id) if v.number == gone[0].number)
    assert back.pruned_at is None and back.snapshot is not None
    assert first_difference(before[back.number], bytes(back.snapshot)) is None
    assert replay(database_url, "--version", number).exit_code == 0  # now comparable
    db.engine.dispose()


def test_forgotten_records_are_reported_instead_of_a_mismatch(database_url: str) -> None:
    db, model_id = trained_online(database_url)
    last = versions(db, model_id)[-1]
    with db.write() as session, session.begin():
        gone = session.scalars(select(RecordRow.seq).where(
            RecordRow.model_id == model_id, RecordRow.split == "train",
            RecordRow.seq <= last.cursor).order_by(RecordRow.seq).offset(60).limit(3)).all()
        session.execute(delete(RecordRow).where(RecordRow.seq.in_(gone)))
    result = replay(database_url, "--version", str(last.number))
    assert result.exit_code == 2, result.output
    assert f"3 of the {last.records_seen} train records it learned" in result.output
    assert "forgotten" in result.output and "differs" not in result.output
    db.engine.dispose()


def test_a_version_that_is_not_there_cannot_be_replayed(database_url: str) -> None:
    db = database(database_url)
    new_model(db, pump_spec())
    result = replay(database_url, "--version", "7")
    assert result.exit_code == 3
    assert "has no version 7" in result.output
    db.engine.dispose()


def test_a_restored_version_is_not_taken_for_a_replayable_one(
        database_url: str, tmp_path: Path) -> None:
    db, model_id = trained_online(database_url)
    runner = CliRunner()
    env = {"KEELSON_DATABASE_URL": database_url}
    number = str(versions(db, model_id)[-1].number)
    file = tmp_path / "pumps.keelson"
    for args in (["export-version", "pumps", number, str(file)],
                 ["restore", str(file), "--as", "pumps-copy"]):
        done = runner.invoke(cli, args, env=env, catch_exceptions=False)
        assert done.exit_code == 0, done.output
    result = runner.invoke(cli, ["replay", "pumps-copy", "--quiet"], env=env,
                           catch_exceptions=False)
    assert result.exit_code == 3, result.output
    assert "restored from a file" in result.stderr
    db.engine.dispose()
