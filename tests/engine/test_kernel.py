"""The kernel's one backward routine against central finite differences, in each of
its forms, and the table's scalar forms against its array forms.

Numerical gradient checking is common practice (no source); scikit-learn's
test_mlp.py::test_gradient does the same for its MLP.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from engine import heads
from engine.activations import ACTIVATIONS, HEADS, logistic, logistic_
from engine.kernel import Workspace, backward, forward
from engine.network import Network

HEAD_LOSSES = [("logistic", "cross_entropy", 1), ("logistic", "squared_error", 1),
               ("softmax", "cross_entropy", 3), ("identity", "squared_error", 1)]
DEPTHS = {0: (), 1: (5,), 2: (5, 4), 3: (5, 4, 3)}
CASES = list(itertools.product(ACTIVATIONS, HEAD_LOSSES, DEPTHS))
EPS = 1e-6


def relative_error(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.linalg.norm(a - b) / max(np.linalg.norm(a), np.linalg.norm(b), 1e-300))


def make(activation: str, output: str, k: int, depth: int, seed: int) -> Network:
    rng = np.random.default_rng(seed)
    net = Network.create((4, *DEPTHS[depth], k), activation, output, rng)
    net.params += rng.normal(scale=0.3, size=net.params.size)  # non-zero biases too
    return net


def augmented(X: np.ndarray) -> np.ndarray:
    """Examples as columns with a row of ones below: the kernel's input block."""
    return np.vstack([X.T, np.ones((1, X.shape[0]))])


def mean_loss(net: Network, loss: str, X: np.ndarray, y: np.ndarray) -> float:
    return float(heads.losses(net.output, loss, net.logits(X), y).mean())


def numeric_parameter_gradient(net: Network, loss: str, X: np.ndarray,
                               y: np.ndarray) -> np.ndarray:
    numeric = np.empty_like(net.params)
    for j in range(net.params.size):
        saved = net.params[j]
        net.params[j] = saved + EPS
        up = mean_loss(net, loss, X, y)
        net.params[j] = saved - EPS
        down = mean_loss(net, loss, X, y)
        net.params[j] = saved
        numeric[j] = (up - down) / (2 * EPS)
    return numeric


def targets(output: str, k: int, n: int, rng: np.random.Generator) -> np.ndarray:
    if output == "identity":
        return rng.normal(size=n)
    return rng.integers(0, max(k, 2), size=n)


@pytest.mark.parametrize(("activation", "head", "depth"), CASES)
def test_one_record_backward_from_the_loss_matches_central_differences(activation, head,
                                                                       depth):
    """The online form: one example; a single output backpropagates the unit delta
    (dz/dparams) and scales by the scalar dLoss/dz, a softmax starts from p - onehot."""
    output, loss, k = head
    net = make(activation, output, k, depth, seed=depth)
    rng = np.random.default_rng(100 + depth)
    grad = np.empty_like(net.params)
    work = Workspace(net, 1, grad=grad)
    for _ in range(3):
        x = rng.normal(size=(1, 4))
        y = targets(output, k, 1, rng)
        inputs = augmented(x)
        z = forward(work, inputs)
        if k == 1:
            value = HEADS[output].value
            assert value is not None
            p = value(float(z[0, 0]))
            backward(work, inputs, 0, 1.0)
            grad *= heads.SCALAR_DELTA[output, loss](p, y.tolist()[0])
        else:
            p_rows = HEADS[output].activate_(work.outputs)
            heads.delta_(output, loss, p_rows, y, work.delta.T)
            backward(work, inputs)
        assert relative_error(grad, numeric_parameter_gradient(net, loss, x, y)) < 1e-6


@pytest.mark.parametrize(("activation", "head", "depth"), CASES)
def test_batch_backward_from_the_loss_matches_central_differences(activation, head, depth):
    """The batch form: the mean loss over six examples, delta from the array forms."""
    output, loss, k = head
    net = make(activation, output, k, depth, seed=10 + depth)
    rng = np.random.default_rng(200 + depth)
    X, y = rng.normal(size=(6, 4)), targets(output, k, 6, rng)
    grad = np.empty_like(net.params)
    work = Workspace(net, 6, grad=grad)
    inputs = augmented(X)
    forward(work, inputs)
    p = HEADS[output].activate_(work.outputs)
    heads.delta_(output, loss, p, y, work.delta.T)
    backward(work, inputs)
    grad /= 6
    assert relative_error(grad, numeric_parameter_gradient(net, loss, X, y)) < 1e-6


@pytest.mark.parametrize(("activation", "head", "depth"), CASES)
def test_backward_from_a_jacobian_row_matches_central_differences_of_the_outputs(
        activation, head, depth):
    """The attribution form: the first rows go backward from d output / d logits; per
    row, weighted over rows, and for one point with the head's slope as a float."""
    output, _, k = head
    net = make(activation, output, k, depth, seed=20 + depth)
    X = np.random.default_rng(300 + depth).normal(size=(7, 4))
    points = 5  # the last two rows only go forward
    h = HEADS[output]
    for unit in range(k):
        numeric = np.empty((points, 4))
        for j in range(4):
            step = np.zeros_like(X[:points])
            step[:, j] = EPS
            numeric[:, j] = (net.forward(X[:points] + step)[:, unit]
                             - net.forward(X[:points] - step)[:, unit]) / (2 * EPS)
        work = Workspace(net, 7, points)
        inputs = augmented(X)
        forward(work, inputs)
        p = h.activate_(work.outputs)
        h.jacobian_row(p[:points], unit, work.delta.T)
        gradient = backward(work, inputs)
        assert relative_error(gradient.T, numeric) < 1e-6
        weights = np.linspace(0.5, 1.5, points)
        summed = backward(work, inputs, row_weights=weights)
        assert relative_error(summed, weights @ numeric) < 1e-6
        if k == 1:  # one point: the slope as a float
            one = Workspace(net, 2, 1)
            inputs = augmented(X[:2])
            z = forward(one, inputs)
            assert h.value is not None and h.slope is not None
            gradient = backward(one, inputs, 0, h.slope(h.value(float(z[0, 0]))))
            assert gradient.shape == (4,)
            assert relative_error(gradient, numeric[0]) < 1e-6


@pytest.mark.parametrize("depth", DEPTHS)
def test_every_weight_row_gives_the_same_pass(depth):
    """An optimizer may keep the weights in several rows (SGD in a run of steps):
    the views of each row compute what the network's own do."""
    net = make("tanh", "logistic", 1, depth, seed=30)
    other = np.array(net.params)
    grad, grad_other = np.empty_like(net.params), np.empty_like(net.params)
    work = Workspace(net, 1, grad=grad, weight_rows=(net.params, other))
    inputs = augmented(np.random.default_rng(5).normal(size=(1, 4)))
    z = forward(work, inputs, 0).copy()
    backward(work, inputs, 0, 1.0)
    grad_other[...] = grad
    assert np.array_equal(forward(work, inputs, 1), z)
    backward(work, inputs, 1, 1.0)
    assert np.array_equal(grad, grad_other)
    other *= 2.0  # the views follow the row they belong to
    assert not np.array_equal(forward(work, inputs, 1), z)
    assert np.array_equal(forward(work, inputs, 0), z)


def test_learning_workspaces_take_every_row_backward():
    net = make("tanh", "logistic", 1, 1, seed=0)
    with pytest.raises(ValueError):
        Workspace(net, 4, 2, grad=np.empty_like(net.params))
    with pytest.raises(ValueError):
        Workspace(net, 2, 3)


# ------------------------------------------------------------ the table's forms
Z = np.concatenate([np.linspace(-40.0, 40.0, 801), [-745.0, -700.0, 0.0, 700.0, 1e300]])


def test_the_logistic_function_in_both_forms_agrees_with_its_definition():
    """1 / (1 + e^-z) (definition), for every z without overflow: the scalar form to
    rounding relatively, the array form ((1 + tanh(z/2)) / 2) absolutely; the two
    within 2^-52 of each other."""
    array = logistic_(Z, np.empty_like(Z))
    scalar = np.array([logistic(z) for z in Z.tolist()])
    with np.errstate(over="ignore"):  # (in extended precision: e^745 is finite there)
        exact = (1.0 / (1.0 + np.exp(-Z.astype(np.longdouble)))).astype(np.float64)
    np.testing.assert_allclose(scalar, exact, rtol=1e-15, atol=0)
    np.testing.assert_allclose(array, exact, rtol=0, atol=1.2e-16)
    assert np.max(np.abs(array - scalar)) <= 2.0**-52
    assert np.all((array >= 0.0) & (array <= 1.0))


@pytest.mark.parametrize("name", ["logistic", "identity"])
def test_single_output_heads_agree_in_their_scalar_and_array_forms(name):
    head = HEADS[name]
    assert head.value is not None and head.slope is not None
    z = Z[np.abs(Z) < 50.0]
    p = head.activate_(z.copy()[:, None])
    scalar = np.array([head.value(v) for v in z.tolist()])
    assert np.max(np.abs(p[:, 0] - scalar)) <= 2.0**-52
    rows = head.jacobian_row(p, 0, np.empty_like(p))[:, 0]
    np.testing.assert_array_equal(rows, [head.slope(v) for v in p[:, 0].tolist()])


def test_softmax_has_only_an_array_form_and_its_jacobian_row_is_the_derivative():
    """d p_u / d z_j = p_u (delta_uj - p_j), checked by central differences."""
    head = HEADS["softmax"]
    assert head.value is None and head.slope is None
    z = np.random.default_rng(0).normal(size=(4, 3))
    p = head.activate_(z.copy())
    np.testing.assert_allclose(p.sum(axis=1), 1.0, rtol=1e-15)
    for unit in range(3):
        rows = head.jacobian_row(p, unit, np.empty_like(p))
        for j in range(3):
            step = np.zeros_like(z)
            step[:, j] = EPS
            numeric = (head.activate_(z + step)[:, unit]
                       - head.activate_(z - step)[:, unit]) / (2 * EPS)
            np.testing.assert_allclose(rows[:, j], numeric, rtol=1e-7, atol=1e-10)


@pytest.mark.parametrize(("output", "loss"), sorted(heads.SCALAR_DELTA))
def test_scalar_loss_deltas_equal_the_array_form(output, loss):
    rng = np.random.default_rng(1)
    p = rng.uniform(0.01, 0.99, size=(50, 1)) if output == "logistic" \
        else rng.normal(size=(50, 1))
    y = rng.integers(0, 2, size=50) if output == "logistic" else rng.normal(size=50)
    array = heads.delta_(output, loss, p, y, np.empty_like(p))[:, 0]
    scalar = [heads.SCALAR_DELTA[output, loss](a, t) for a, t in
              zip(p[:, 0].tolist(), y.tolist(), strict=True)]
    np.testing.assert_array_equal(array, scalar)


@pytest.mark.parametrize("name", list(ACTIVATIONS))
def test_activation_slopes_match_central_differences(name):
    """f'(z) written from y = f(z) against (f(z + h) - f(z - h)) / 2h, away from
    relu's kink."""
    activation = ACTIVATIONS[name]
    z = np.linspace(-3.0, 3.0, 61) + 0.005

    def f(v: np.ndarray) -> np.ndarray:
        out = np.empty_like(v)
        activation.apply(v, out)
        return out

    slope = np.empty_like(z)
    activation.slope(f(z), slope, np.ones_like(z))
    numeric = (f(z + EPS) - f(z - EPS)) / (2 * EPS)
    np.testing.assert_allclose(slope, numeric, rtol=1e-7, atol=1e-9)
