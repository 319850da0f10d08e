"""Online trainer: one record one step, test-then-train, determinism."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from engine.metrics import Prequential
from engine.network import Network
from engine.online import OnlineTrainer
from engine.optimizers import make_optimizer
from engine.spec import TRAINING_DEFAULTS

HEADS = [("logistic", "cross_entropy", 1), ("logistic", "squared_error", 1),
         ("softmax", "cross_entropy", 3), ("identity", "squared_error", 1)]
DEPTHS = {0: (), 1: (6,), 2: (6, 5), 3: (6, 5, 4)}


def problem(output: str, k: int, n: int, seed: int):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 4))
    if output == "identity":
        y = X @ np.array([0.5, -1.0, 0.3, 0.0]) + 0.1 * rng.normal(size=n)
    else:
        y = rng.integers(0, max(k, 2), size=n)
    return X, y


@pytest.mark.parametrize(("activation", "head", "depth", "optimizer"), list(
    itertools.product(["tanh", "logistic", "relu"], HEADS, DEPTHS, ["sgd", "adam"])))
def test_online_steps_equal_batch_steps_of_size_one_in_the_same_order(
        activation, head, depth, optimizer):
    """Repeated online steps against a batch of one (common practice, no source)."""
    output, loss, k = head
    settings = {**TRAINING_DEFAULTS, "optimizer": optimizer, "learning_rate": 0.05,
                "nesterov": depth == 2}
    sizes = (4, *DEPTHS[depth], k)
    X, y = problem(output, k, 40, seed=depth)
    online_net = Network.create(sizes, activation, output, np.random.default_rng(5))
    batch_net = online_net.copy()
    trainer = OnlineTrainer(online_net, make_optimizer(online_net.params.size, settings), loss)
    scores = np.empty((40, k))
    trainer.learn(X, y, scores)
    opt = make_optimizer(batch_net.params.size, settings)
    batch_net.bind_(opt.params)
    expected_scores = np.empty_like(scores)
    for i in range(40):
        expected_scores[i] = batch_net.forward(X[i : i + 1])[0]
        batch_net.loss_gradient(X[i : i + 1], y[i : i + 1], loss, out=opt.grad)
        opt.step_()
    np.testing.assert_allclose(online_net.params, batch_net.params, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(scores, expected_scores, rtol=1e-10, atol=1e-12)


def test_the_same_seed_and_records_give_bit_identical_weights():
    X, y = problem("logistic", 1, 300, seed=1)
    results = []
    for _ in range(2):
        net = Network.create((4, 8, 1), "tanh", "logistic", np.random.default_rng(3))
        trainer = OnlineTrainer(net, make_optimizer(net.params.size, TRAINING_DEFAULTS),
                                "cross_entropy")
        trainer.learn(X, y, np.empty((300, 1)))
        results.append(net.params.copy())
    assert np.array_equal(results[0], results[1])


def test_metrics_receive_each_score_before_the_step():
    """Prequential evaluation (Dawid 1984): every record is scored before training."""
    X, y = problem("softmax", 3, 50, seed=2)
    net = Network.create((4, 5, 3), "tanh", "softmax", np.random.default_rng(0))
    check = net.copy()
    trainer = OnlineTrainer(net, make_optimizer(net.params.size, TRAINING_DEFAULTS),
                            "cross_entropy")
    metrics = Prequential("multiclass", 3)
    scores = np.empty((50, 3))
    trainer.learn(X, y, scores, metrics)
    np.testing.assert_allclose(scores[0], check.forward(X[:1])[0], rtol=1e-14)
    expected = -np.mean(np.log(scores[np.arange(50), y]))
    assert metrics.result()["log_loss"] == pytest.approx(expected, rel=1e-12)
    assert metrics.result()["n"] == 50


def test_xor_is_learnt_online_by_a_small_hidden_layer():
    """Minsky & Papert, Perceptrons (1969): XOR needs a hidden layer; with one it is learnt."""
    X = np.array([[0.0, 0.0], [0.0, 1.0], [1.0, 0.0], [1.0, 1.0]])
    y = np.array([0, 1, 1, 0])
    net = Network.create((2, 4, 1), "tanh", "logistic", np.random.default_rng(0))
    settings = {**TRAINING_DEFAULTS, "learning_rate": 0.1, "l2": 0.0}
    trainer = OnlineTrainer(net, make_optimizer(net.params.size, settings), "cross_entropy")
    order = np.random.default_rng(1).integers(0, 4, size=4000)
    trainer.learn(X[order], y[order], np.empty((4000, 1)))
    assert np.array_equal(net.forward(X)[:, 0] > 0.5, y == 1)


@pytest.mark.parametrize("nesterov", [False, True])
@pytest.mark.parametrize("schedule", ["constant", "inverse_power"])
def test_weights_do_not_depend_on_how_the_stream_is_cut_into_calls(nesterov, schedule):
    """SGD moves the weights between two rows at every step (step_swapping_); calls of
    odd and even lengths, and a resume from the optimizer state at an odd step
    count, must still give the weights of one uninterrupted call, bit for bit."""
    X, y = problem("logistic", 1, 120, seed=6)
    settings = {**TRAINING_DEFAULTS, "nesterov": nesterov, "lr_schedule": schedule,
                "learning_rate": 0.05}

    def trainer(net):
        return OnlineTrainer(net, make_optimizer(net.params.size, settings), "cross_entropy")

    start = Network.create((4, 6, 5, 1), "tanh", "logistic", np.random.default_rng(2))
    whole = start.copy()
    trainer(whole).learn(X, y, np.empty((120, 1)))
    cut = start.copy()
    pieces = trainer(cut)
    bounds = [0, 1, 3, 4, 11, 57]
    for a, b in zip(bounds, bounds[1:], strict=False):
        pieces.learn(X[a:b], y[a:b], np.empty((b - a, 1)))
    resumed = Network(cut.sizes, "tanh", "logistic", cut.params)  # step count 57: odd
    again = trainer(resumed)
    again.optimizer.load_state(pieces.optimizer.state_arrays(), pieces.optimizer.step_count)
    again.learn(X[57:], y[57:], np.empty((63, 1)))
    pieces.learn(X[57:], y[57:], np.empty((63, 1)))
    assert np.array_equal(cut.params, whole.params)
    assert np.array_equal(resumed.params, whole.params)
