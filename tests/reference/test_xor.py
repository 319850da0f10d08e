"""XOR: a network with no hidden layer cannot fit it; one with a small hidden layer
learns it online. Source: Minsky & Papert, Perceptrons (1969)."""

from __future__ import annotations

import numpy as np

from engine import Learner

POINTS = [{"a": 0.0, "b": 0.0}, {"a": 0.0, "b": 1.0}, {"a": 1.0, "b": 0.0},
          {"a": 1.0, "b": 1.0}]
LABELS = [False, True, True, False]


def train(hidden: list[int]) -> float:
    spec = {"task": "binary", "features": [{"name": "a", "type": "numeric"},
                                           {"name": "b", "type": "numeric"}],
            "hidden_layers": hidden, "activation": "tanh",
            "training": {"learning_rate": 0.05, "l2": 0.0, "seed": 3}}
    learner = Learner.create(spec, warmup=POINTS)
    X, Y = learner.encode(POINTS), learner.encode_labels(LABELS)
    order = np.random.default_rng(0).integers(0, 4, size=6000)
    learner.learn(X[order], Y[order])
    return float(learner.evaluate(X, Y)["accuracy"])


def test_no_hidden_layer_cannot_fit_xor():
    # A linear threshold unit separates at most 3 of the 4 XOR points.
    assert train([]) <= 0.75


def test_a_small_hidden_layer_learns_xor_online():
    assert train([4]) == 1.0
