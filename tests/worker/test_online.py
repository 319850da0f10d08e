"""Online learning through the worker: records in, versions out."""

from __future__ import annotations

import numpy as np

from engine import Learner
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
        wait_until(lambda: caught_up(db, model_id), timeout=40)
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
