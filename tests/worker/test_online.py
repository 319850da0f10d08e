"""Online learning through the worker: records in, versions out."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import accuracy_score, log_loss
from sqlalchemy import select

from engine import Learner
from service.store.tables import RecordRow
from tests.worker.helpers import (
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


def xor_records(n: int, seed: int) -> list[dict]:
    rng = np.random.default_rng(seed)
    points = rng.integers(0, 2, size=(n, 2))
    return [{"features": {"a": float(a), "b": float(b)}, "label": bool(a != b)}
            for a, b in points]


def test_xor_is_learned_online_from_records_alone(database_url: str) -> None:
    """XOR is not linearly separable, yet a net with one hidden layer learns it
    (Minsky & Papert, Perceptrons, 1969; the hidden layer is what backpropagation
    adds). Labels are the XOR truth table itself, not invented values."""
    db = database(database_url)
    spec = numeric_spec("xor", ["a", "b"], hidden_layers=[8], activation="tanh",
                        training={"learning_rate": 0.1, "momentum": 0.9,
                                  "checkpoint_every": 1000, "warmup_records": 64})
    model_id = new_model(db, spec)
    send(db, "xor", xor_records(5000, seed=1))
    with worker_thread(database_url):
        wait_until(lambda: caught_up(db, model_id), timeout=120)
    rows = versions(db, model_id)
    head = trainer(db, model_id)
    assert head.error is None and head.head_version_id == rows[-1].id
    n_train = model_row(db, model_id).records_train
    assert rows[-1].records_seen == n_train
    assert [v.records_seen for v in rows[:-1]] == [1000 * (i + 1) for i in range(len(rows) - 1)]
    active = model_row(db, model_id).active_version_id
    assert active is not None
    learner = Learner.from_bytes(next(v for v in rows if v.id == active).snapshot)
    grid = [{"a": 0.0, "b": 0.0}, {"a": 0.0, "b": 1.0}, {"a": 1.0, "b": 0.0}, {"a": 1.0, "b": 1.0}]
    p_true = learner.predict(learner.encode(grid))[:, 1]
    assert list(p_true > 0.5) == [False, True, True, False]
    db.engine.dispose()


def test_the_stored_prequential_metrics_are_those_of_each_records_score_before_its_step(
    database_url: str,
) -> None:
    """Prequential (test-then-train) evaluation: each record is scored by the
    model as it was before learning from it, and the running metric is the
    metric of those scores (Dawid 1984; Gama, Sebastiao & Rodrigues 2013).
    Checked against scikit-learn's log_loss and accuracy_score over the scores
    a single uninterrupted pass gives each record (the worker's weights equal
    that pass bit for bit: test_crash_replay.py)."""
    db = database(database_url)
    spec = numeric_spec("prequential", ["a", "b"], hidden_layers=[8],
                        training={"checkpoint_every": 400, "warmup_records": 64})
    model_id = new_model(db, spec)
    send(db, "prequential", xor_records(2500, seed=5))
    with worker_thread(database_url, KEELSON_WORKER_CHUNK_RECORDS=70):
        wait_until(lambda: caught_up(db, model_id), timeout=120)
    stored = versions(db, model_id)[-1].metrics["prequential"]

    with db.read() as session:
        rows = session.execute(
            select(RecordRow.features, RecordRow.label)
            .where(RecordRow.model_id == model_id, RecordRow.split == "train")
            .order_by(RecordRow.seq)).all()
    spec_full = model_row(db, model_id).spec
    features, labels = [r[0] for r in rows], [r[1] for r in rows]
    learner = Learner.create(spec_full, warmup=features[:64], warmup_labels=labels[:64])
    scores = learner.learn(learner.encode(features), learner.encode_labels(labels))[:, 0]
    truth = np.array(labels, dtype=bool)
    assert stored["n"] == len(rows) and type(stored["n"]) is int  # a count, not 400.0
    assert stored["accuracy"] == pytest.approx(accuracy_score(truth, scores > 0.5), abs=1e-12)
    assert stored["log_loss"] == pytest.approx(log_loss(truth, scores, labels=[False, True]),
                                               rel=1e-9)
    db.engine.dispose()
