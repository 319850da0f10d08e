"""Network layout, initialisation and forward pass."""

from __future__ import annotations

import numpy as np
import pytest

from engine.errors import InvalidInputError
from engine.network import Network


def test_weights_and_biases_are_views_into_the_flat_parameter_vector():
    net = Network.create((3, 5, 2), "tanh", "softmax", np.random.default_rng(0))
    assert net.params.size == (3 + 1) * 5 + (5 + 1) * 2
    assert [w.shape for w in net.weights] == [(3, 5), (5, 2)]
    assert [b.shape for b in net.biases] == [(5,), (2,)]
    net.params[:] = np.arange(net.params.size)
    assert net.weights[0][0, 0] == 0 and net.biases[0][0] == 15 and net.weights[1][0, 0] == 20
    net.weights[1][...] = -1.0
    assert np.all(net.params[20:30] == -1.0)


def test_glorot_uniform_variance_is_two_over_fan_in_plus_fan_out():
    """Glorot & Bengio (AISTATS 2010): Var W = 2 / (fan_in + fan_out)."""
    net = Network.create((300, 500, 1), "tanh", "logistic", np.random.default_rng(1))
    w = net.weights[0]
    assert abs(w.var() / (2 / 800) - 1) < 0.02
    assert abs(w.mean()) < 1e-3
    assert np.all(net.biases[0] == 0)


def test_he_uniform_variance_is_two_over_fan_in_for_relu():
    """He et al. (ICCV 2015): Var W = 2 / fan_in for rectifier layers."""
    net = Network.create((300, 500, 1), "relu", "logistic", np.random.default_rng(2))
    assert abs(net.weights[0].var() / (2 / 300) - 1) < 0.02


def test_initialisation_is_deterministic_for_a_seed():
    a = Network.create((4, 8, 3), "tanh", "softmax", np.random.default_rng(7))
    b = Network.create((4, 8, 3), "tanh", "softmax", np.random.default_rng(7))
    assert np.array_equal(a.params, b.params)


def test_forward_matches_the_layer_formula_written_out():
    """h = tanh(x W0 + b0), p = softmax(h W1 + b1) (definition of the MLP)."""
    rng = np.random.default_rng(3)
    net = Network.create((4, 6, 3), "tanh", "softmax", rng)
    net.params += rng.normal(scale=0.3, size=net.params.size)
    X = rng.normal(size=(5, 4))
    z = np.tanh(X @ net.weights[0] + net.biases[0]) @ net.weights[1] + net.biases[1]
    expected = np.exp(z) / np.exp(z).sum(axis=1, keepdims=True)
    np.testing.assert_allclose(net.forward(X), expected, rtol=1e-13)
    np.testing.assert_allclose(net.forward(X).sum(axis=1), 1.0, rtol=1e-15)


def test_logistic_head_is_stable_for_huge_logits():
    net = Network((1, 1), "tanh", "logistic")
    net.weights[0][0, 0] = 1.0
    p = net.forward(np.array([[-1000.0], [1000.0]]))
    assert p[0, 0] == 0.0 and p[1, 0] == 1.0
    loss, grad = net.loss_gradient(np.array([[-1000.0], [1000.0]]), np.array([1, 0]),
                                   "cross_entropy")
    assert np.isfinite(loss) and np.all(np.isfinite(grad))


@pytest.mark.parametrize("bad", [np.zeros((2, 3)), np.array([[1.0, np.nan, 0, 0]]),
                                 np.array([[np.inf, 0, 0, 0]])])
def test_bad_inputs_raise_invalid_input(bad):
    net = Network.create((4, 2, 1), "tanh", "logistic", np.random.default_rng(0))
    with pytest.raises(InvalidInputError):
        net.forward(bad)


def test_bad_shapes_and_names_are_refused():
    with pytest.raises(InvalidInputError):
        Network((3, 2), "sigmoid", "logistic")
    with pytest.raises(InvalidInputError):
        Network((3, 2), "tanh", "logistic")
    with pytest.raises(InvalidInputError):
        Network((3, 1), "tanh", "softmax")
    with pytest.raises(InvalidInputError):
        Network((3, 1), "tanh", "identity", params=np.zeros(3))


def test_no_rows_give_no_outputs():
    net = Network.create((3, 4, 2), "tanh", "softmax", np.random.default_rng(0))
    assert net.forward(np.zeros((0, 3))).shape == (0, 2)
    assert net.logits(np.zeros((0, 3))).shape == (0, 2)
    assert net.input_gradient(np.zeros((0, 3)), 1).shape == (0, 3)
