"""A retrain streams its records: the read chunk size changes only how the
records are read, never the weights; with one block the job's weights are the
engine's on the same rows in memory, bit for bit."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from engine import Learner
from engine import rows as engine_rows
from service.usecases.jobs import request_retrain
from service.worker.encoded_file import EncodedRowsFile
from service.worker.leasing import claim_job
from service.worker.retrain import run_retrain
from service.worker.settings import WorkerSettings
from tests.worker.helpers import database, new_model, numeric_spec, send, train_records

FIELDS = ["flow", "pressure", "vibration"]


def pump_records(n: int, seed: int) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 3))
    y = X @ np.array([0.8, -1.5, 1.1]) + 0.4 * rng.normal(size=n) > 0
    return [{"features": dict(zip(FIELDS, map(float, row), strict=True)), "label": bool(t)}
            for row, t in zip(X, y, strict=True)]


def retrained(db: Any, url: str, name: str, chunk_records: int) -> Learner:
    """A from-scratch retrain job of ``name`` run to its version."""
    job = request_retrain(db, name, warm_start=False)
    with db.write() as session, session.begin():
        claimed = claim_job(session, "direct", 30)
        assert claimed is not None and claimed.id == job["id"]
    settings = WorkerSettings(database_url=url, chunk_records=chunk_records)
    version = run_retrain(settings, db.read, db.write, job["id"], "direct")
    return Learner.from_bytes(version.snapshot)


def spec(name: str) -> dict[str, Any]:
    return numeric_spec(name, FIELDS, hidden_layers=[8, 4], promotion="manual",
                        training={"max_epochs": 4, "patience": 100, "batch_size": 16})


def test_the_read_chunk_size_changes_only_the_reads_never_the_weights(
    database_url: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Small blocks, so 900 records make many blocks and buffers.
    monkeypatch.setattr(engine_rows, "BLOCK_ROWS", 40)
    monkeypatch.setattr(engine_rows, "BUFFER_BLOCKS", 3)
    db = database(database_url)
    new_model(db, spec("chunked"))
    send(db, "chunked", pump_records(900, seed=11))
    a = retrained(db, database_url, "chunked", chunk_records=7)
    b = retrained(db, database_url, "chunked", chunk_records=250)
    assert np.array_equal(a.network.params, b.network.params)
    assert np.array_equal(a.input_mean, b.input_mean)
    db.engine.dispose()


def test_with_one_block_the_job_equals_the_engine_on_the_rows_in_memory(
    database_url: str,
) -> None:
    db = database(database_url)
    model_id = new_model(db, spec("one-block"))
    send(db, "one-block", pump_records(700, seed=12))
    job = retrained(db, database_url, "one-block", chunk_records=64)
    features, labels = train_records(db, model_id, after=0)
    assert len(features) < engine_rows.BLOCK_ROWS
    memory = Learner.from_bytes(job.to_bytes())  # the job's encoder, weights refitted
    memory.fit(memory.encode(features), memory.encode_labels(labels))
    assert np.array_equal(memory.network.params, job.network.params)
    db.engine.dispose()


def test_the_row_file_reads_back_what_was_appended_whatever_the_positions(tmp_path) -> None:
    rng = np.random.default_rng(4)
    X, y = rng.normal(size=(300, 5)), rng.integers(0, 3, size=300)
    with EncodedRowsFile(300, 5, y.dtype, directory=str(tmp_path)) as rows:
        for start in range(0, 300, 70):
            rows.append(X[start : start + 70], y[start : start + 70])
        assert len(rows) == 300
        for positions in (np.arange(300), np.array([0, 5, 6, 299]), np.array([17])):
            got_X, got_y = rows.take(positions)
            assert np.array_equal(got_X, X[positions]) and np.array_equal(got_y, y[positions])
        with pytest.raises(ValueError):
            rows.append(X[:1], y[:1])
    assert list(tmp_path.iterdir()) == []  # unnamed: nothing left behind
