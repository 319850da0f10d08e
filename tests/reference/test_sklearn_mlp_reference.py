"""The same weights give scikit-learn's MLPClassifier / MLPRegressor outputs.

Reference library: scikit-learn (coefs_ / intercepts_ set to our weights and biases;
its coefs_ layout (fan_in, fan_out) is ours).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from sklearn.exceptions import ConvergenceWarning
from sklearn.neural_network import MLPClassifier, MLPRegressor

from engine.network import Network

HIDDEN = [(), (6,), (6, 5), (6, 5, 4)]


def reference_model(cls, activation, hidden, X, y):
    model = cls(hidden_layer_sizes=hidden, activation=activation, max_iter=1, random_state=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        model.fit(X, y)
    return model


def our_network(model, activation, output, sizes, seed):
    net = Network.create(sizes, activation, output, np.random.default_rng(seed))
    net.params += np.random.default_rng(seed + 1).normal(scale=0.3, size=net.params.size)
    model.coefs_ = [w.copy() for w in net.weights]
    model.intercepts_ = [b.copy() for b in net.biases]
    return net


@pytest.mark.parametrize("activation", ["tanh", "logistic", "relu"])
@pytest.mark.parametrize("hidden", HIDDEN)
def test_binary_probabilities_match_mlp_classifier(activation, hidden):
    rng = np.random.default_rng(0)
    X = rng.normal(size=(30, 5))
    y = rng.integers(0, 2, size=30)
    model = reference_model(MLPClassifier, activation, hidden, X, y)
    net = our_network(model, activation, "logistic", (5, *hidden, 1), seed=len(hidden))
    np.testing.assert_allclose(net.forward(X)[:, 0], model.predict_proba(X)[:, 1],
                               rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("activation", ["tanh", "logistic", "relu"])
@pytest.mark.parametrize("hidden", HIDDEN)
def test_multiclass_probabilities_match_mlp_classifier(activation, hidden):
    rng = np.random.default_rng(1)
    X = rng.normal(size=(30, 5))
    y = rng.integers(0, 3, size=30)
    model = reference_model(MLPClassifier, activation, hidden, X, y)
    net = our_network(model, activation, "softmax", (5, *hidden, 3), seed=10 + len(hidden))
    np.testing.assert_allclose(net.forward(X), model.predict_proba(X), rtol=1e-12,
                               atol=1e-15)


@pytest.mark.parametrize("activation", ["tanh", "logistic", "relu"])
@pytest.mark.parametrize("hidden", HIDDEN)
def test_regression_values_match_mlp_regressor(activation, hidden):
    rng = np.random.default_rng(2)
    X = rng.normal(size=(30, 5))
    y = rng.normal(size=30)
    model = reference_model(MLPRegressor, activation, hidden, X, y)
    net = our_network(model, activation, "identity", (5, *hidden, 1), seed=20 + len(hidden))
    np.testing.assert_allclose(net.forward(X)[:, 0], model.predict(X), rtol=1e-12,
                               atol=1e-14)
