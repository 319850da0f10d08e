"""Learner.retune: other training options from here on, same weights and
optimizer state (a model's settings change, PATCH /v1/models/{name})."""

from __future__ import annotations

import numpy as np
import pytest

from engine import InvalidInputError, Learner
from tests.engine.test_learner import rows_and_labels, spec

PLAIN_SGD = {"optimizer": "sgd", "learning_rate": 0.05, "momentum": 0.0, "l2": 0.0,
             "clip_norm": None, "lr_schedule": "constant"}


def trained(training: dict, n: int = 40) -> tuple[Learner, np.ndarray, np.ndarray]:
    rows, labels = rows_and_labels("binary", n + 20)
    learner = Learner.create(spec(training=training), warmup=rows[:n], warmup_labels=labels[:n])
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    learner.learn(X[:n], Y[:n])
    return learner, X[n:], Y[n:]


def test_retuning_to_the_same_options_changes_nothing() -> None:
    kept, X, Y = trained({"optimizer": "adam", "learning_rate": 0.01})
    retuned = Learner.from_bytes(kept.to_bytes())
    retuned.retune(dict(retuned.spec["training"]))
    kept.learn(X, Y)
    retuned.learn(X, Y)
    assert np.array_equal(kept.network.params, retuned.network.params)
    assert kept.to_bytes() == retuned.to_bytes()


def test_plain_sgd_steps_scale_with_the_new_rate() -> None:
    # Plain SGD (no momentum, decay or clipping): w <- w - rate * gradient, so
    # from the same state one step's change scales with the rate (the update
    # rule's definition, from memory).
    old, X, Y = trained(PLAIN_SGD)
    new = Learner.from_bytes(old.to_bytes())
    new.retune({"learning_rate": 0.0125})
    start = old.network.params.copy()
    old.learn(X[:1], Y[:1])
    new.learn(X[:1], Y[:1])
    np.testing.assert_allclose(new.network.params - start,
                               (old.network.params - start) * 0.25, rtol=1e-12, atol=1e-15)
    assert new.spec["training"]["learning_rate"] == 0.0125


def test_a_retuned_learner_snapshots_its_new_options_and_continues_the_same() -> None:
    learner, X, Y = trained({"optimizer": "sgd", "learning_rate": 0.05})
    learner.retune({"learning_rate": 0.01, "momentum": 0.5})
    loaded = Learner.from_bytes(learner.to_bytes())
    assert loaded.spec["training"]["momentum"] == 0.5
    assert loaded.optimizer.step_count == learner.optimizer.step_count
    learner.learn(X, Y)
    loaded.learn(X, Y)
    assert np.array_equal(learner.network.params, loaded.network.params)


def test_the_optimizer_kind_cannot_change() -> None:
    learner, _, _ = trained({"optimizer": "sgd"})
    before = learner.to_bytes()
    with pytest.raises(InvalidInputError):
        learner.retune({"optimizer": "adam"})
    assert learner.to_bytes() == before
