"""Backpropagated gradients against central finite differences.

Numerical gradient checking is common practice (no source); scikit-learn's
test_mlp.py::test_gradient does the same for its MLP.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from engine import heads
from engine.network import Network

HEADS = [("logistic", "cross_entropy", 1), ("logistic", "squared_error", 1),
         ("softmax", "cross_entropy", 3), ("identity", "squared_error", 1)]
ACTIVATIONS = ["tanh", "logistic", "relu"]
HIDDEN = {0: (), 1: (5,), 2: (5, 4), 3: (5, 4, 3)}
EPS = 1e-6


def _relative_error(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.linalg.norm(a - b) / max(np.linalg.norm(a), np.linalg.norm(b), 1e-300))


def _case(activation: str, output: str, k: int, depth: int, seed: int):
    rng = np.random.default_rng(seed)
    net = Network.create((4, *HIDDEN[depth], k), activation, output, rng)
    net.params += rng.normal(scale=0.1, size=net.params.shape)  # non-zero biases too
    X = rng.normal(size=(6, 4))
    y = rng.integers(0, k, size=6) if output != "identity" else rng.normal(size=6)
    if output == "logistic":
        y = rng.integers(0, 2, size=6)
    return net, X, y


@pytest.mark.parametrize(("activation", "head", "depth"),
                         list(itertools.product(ACTIVATIONS, HEADS, HIDDEN)))
def test_parameter_gradient_matches_central_differences(activation, head, depth):
    output, loss, k = head
    net, X, y = _case(activation, output, k, depth, seed=depth)
    _, grad = net.loss_gradient(X, y, loss)
    numeric = np.empty_like(grad)
    for j in range(net.params.size):
        saved = net.params[j]
        net.params[j] = saved + EPS
        up = net.loss_gradient(X, y, loss)[0]
        net.params[j] = saved - EPS
        down = net.loss_gradient(X, y, loss)[0]
        net.params[j] = saved
        numeric[j] = (up - down) / (2 * EPS)
    assert _relative_error(grad, numeric) < 1e-6


@pytest.mark.parametrize(("activation", "head", "depth"),
                         list(itertools.product(ACTIVATIONS, HEADS, HIDDEN)))
@pytest.mark.parametrize("of", ["output", "logit"])
def test_input_gradient_matches_central_differences(activation, head, depth, of):
    output, _, k = head
    net, X, _ = _case(activation, output, k, depth, seed=10 + depth)
    f = net.forward if of == "output" else net.logits
    for index in range(k):
        grad = net.input_gradient(X, index, of=of)
        numeric = np.empty_like(X)
        for j in range(X.shape[1]):
            step = np.zeros_like(X)
            step[:, j] = EPS
            numeric[:, j] = (f(X + step)[:, index] - f(X - step)[:, index]) / (2 * EPS)
        assert _relative_error(grad, numeric) < 1e-6


def test_one_example_gradient_is_the_batch_gradient_of_one_row():
    net, X, y = _case("tanh", "softmax", 3, 2, seed=3)
    per_row = [net.loss_gradient(X[i : i + 1], y[i : i + 1], "cross_entropy")[1]
               for i in range(len(X))]
    # The mean loss's gradient is the mean of per-example gradients (linearity).
    np.testing.assert_allclose(np.mean(per_row, axis=0),
                               net.loss_gradient(X, y, "cross_entropy")[1], rtol=1e-12,
                               atol=1e-15)


def test_logistic_and_tanh_derivatives_follow_the_published_rules():
    """dy/dz = y(1 - y) for the logistic unit, 1 - y^2 for tanh (standard calculus)."""
    from engine.activations import ACTIVATIONS
    z = np.linspace(-4, 4, 17)
    ones = np.ones_like(z)
    y = 1 / (1 + np.exp(-z))
    np.testing.assert_allclose(ACTIVATIONS["logistic"].slope(y, np.empty_like(y), ones),
                               np.exp(-z) / (1 + np.exp(-z)) ** 2, rtol=1e-12)
    t = np.tanh(z)
    np.testing.assert_allclose(ACTIVATIONS["tanh"].slope(t, np.empty_like(t), ones),
                               1 / np.cosh(z) ** 2, rtol=1e-12)


def _cost_ratio(sizes: tuple[int, ...]) -> tuple[int, float]:
    """Time of a full gradient by forward differences over one backpropagation."""
    import time
    rng = np.random.default_rng(0)
    net = Network.create(sizes, "tanh", "logistic", rng)
    X, y = rng.normal(size=(1, sizes[0])), np.array([1])

    def best_of(run, repeats=5):
        times = []
        for _ in range(repeats):
            start = time.process_time()
            run()
            times.append(time.process_time() - start)
        return min(times)

    def loss():  # a forward pass only
        return heads.losses("logistic", "cross_entropy", net.logits(X), y).mean()

    def perturb_all():
        base = loss()
        for j in range(net.params.size):
            saved = net.params[j]
            net.params[j] = saved + EPS
            _ = (loss() - base) / EPS
            net.params[j] = saved

    def backprop_many():
        for _ in range(50):
            net.loss_gradient(X, y, "cross_entropy")

    return net.params.size, best_of(perturb_all) / (best_of(backprop_many) / 50)


def test_perturbation_costs_grow_with_the_weight_count_and_backprop_does_not():
    """Perturbing one weight at a time needs a forward pass per weight; backpropagation
    a constant number: the measured ratio grows with the weights (common practice,
    no source)."""
    small_weights, small_ratio = _cost_ratio((3, 4, 1))
    large_weights, large_ratio = _cost_ratio((20, 24, 16, 1))
    assert large_weights > 20 * small_weights
    assert large_ratio > 5 * small_ratio
    assert large_ratio > large_weights / 10
