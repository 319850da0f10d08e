"""Batch trainer: epochs from a seed, validation split, early stopping, cancel, warm start."""

from __future__ import annotations

import numpy as np
import pytest

from engine import TrainingCancelled
from engine.batch import fit, mean_loss, split_validation
from engine.network import Network
from engine.optimizers import make_optimizer
from engine.rows import ArrayRows
from engine.spec import TRAINING_DEFAULTS


def problem(n=300, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 5))
    y = (X[:, 0] * X[:, 1] + 0.3 * rng.normal(size=n) > 0).astype(np.int64)
    return X, y


def trained(settings, X, y, **kwargs):
    net = Network.create((5, 8, 1), "tanh", "logistic", np.random.default_rng(0))
    opt = make_optimizer(net.params.size, settings)
    net.bind_(opt.params)
    report = fit(net, opt, "cross_entropy", ArrayRows(X, y), settings, **kwargs)
    return net, report


def test_validation_split_is_carved_from_the_rows_and_seeded():
    a = split_validation(100, 0.2, np.random.default_rng(3))
    b = split_validation(100, 0.2, np.random.default_rng(3))
    assert all(np.array_equal(u, v) for u, v in zip(a, b, strict=True))
    train, val = a
    assert len(val) == 20 and len(train) == 80
    assert sorted(np.concatenate([train, val]).tolist()) == list(range(100))
    assert len(split_validation(10, 0.05, np.random.default_rng(0))[1]) == 0


def test_early_stopping_restores_the_best_epoch_weights():
    X, y = problem()
    settings = {**TRAINING_DEFAULTS, "learning_rate": 0.5, "momentum": 0.9, "patience": 3,
                "max_epochs": 400, "batch_size": 16, "validation_fraction": 0.3}
    net, report = trained(settings, X, y)
    assert report.stopped_early and report.epochs < 400
    assert report.epochs - report.best_epoch == 3
    validation_losses = [h[2] for h in report.history]
    best = validation_losses[report.best_epoch - 1]
    assert report.validation_loss == best
    _, val = split_validation(300, 0.3, np.random.default_rng(settings["seed"]))
    assert mean_loss(net, "cross_entropy", X[val], y[val]) == pytest.approx(best, rel=1e-12)


def test_a_fit_is_reproducible_for_a_seed_and_changes_with_it():
    X, y = problem()
    settings = {**TRAINING_DEFAULTS, "max_epochs": 5}
    a, _ = trained(settings, X, y)
    b, _ = trained(settings, X, y)
    c, _ = trained({**settings, "seed": 1}, X, y)
    assert np.array_equal(a.params, b.params)
    assert not np.array_equal(a.params, c.params)


def test_progress_reports_every_epoch_and_cancel_stops():
    X, y = problem()
    settings = {**TRAINING_DEFAULTS, "max_epochs": 4, "patience": 10}
    seen = []
    _, report = trained(settings, X, y, progress=lambda *args: seen.append(args))
    assert [s[0] for s in seen] == [1, 2, 3, 4] and report.epochs == 4
    assert all(isinstance(s[1], float) and isinstance(s[2], float) for s in seen)
    epochs = []
    with pytest.raises(TrainingCancelled):
        trained(settings, X, y, progress=lambda *args: epochs.append(args[0]),
                cancel=lambda: len(epochs) >= 2)
    assert epochs == [1, 2]


def test_without_a_validation_split_the_training_loss_is_watched():
    X, y = problem(n=60)
    settings = {**TRAINING_DEFAULTS, "validation_fraction": 0.0, "max_epochs": 20}
    _, report = trained(settings, X, y)
    assert report.n_validation == 0 and report.validation_loss is None
    assert report.history[-1][1] < report.history[0][1]


def test_one_epoch_of_batches_of_one_equals_online_steps_in_that_order():
    """Mini-batch SGD with batch size 1 is per-example SGD (common practice, no source)."""
    from engine.online import OnlineTrainer
    X, y = problem(n=50)
    settings = {**TRAINING_DEFAULTS, "batch_size": 1, "max_epochs": 1,
                "validation_fraction": 0.0}
    batch_net, _ = trained(settings, X, y)
    order = np.random.default_rng(settings["seed"])
    order.permutation(50)  # the (empty) validation split draws first
    epoch_order = order.permutation(50)
    net = Network.create((5, 8, 1), "tanh", "logistic", np.random.default_rng(0))
    trainer = OnlineTrainer(net, make_optimizer(net.params.size, settings), "cross_entropy")
    trainer.learn(X[epoch_order], y[epoch_order], np.empty((50, 1)))
    np.testing.assert_allclose(net.params, batch_net.params, rtol=1e-10, atol=1e-12)


def test_warm_start_continues_from_the_given_weights():
    from engine import Learner
    from tests.engine.test_learner import rows_and_labels, spec
    rows, labels = rows_and_labels("binary", 300)
    learner = Learner.create(spec(training={"max_epochs": 3}), warmup=rows)
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    learner.fit(X, Y)
    after_first = learner.network.params.copy()
    loss_first = learner.evaluate(X, Y)["log_loss"]
    report = learner.fit(X, Y, warm_start=True)
    assert not np.array_equal(after_first, learner.network.params)
    assert learner.evaluate(X, Y)["log_loss"] < loss_first
    assert report.history[0][1] < 0.9 * loss_first + 0.1  # started from trained weights
    cold = Learner.create(spec(training={"max_epochs": 3}), warmup=rows)
    cold.fit(X, Y)
    assert np.array_equal(cold.network.params, after_first)
