"""The per-record online path allocates nothing that grows with the records (tracemalloc)."""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest

from engine.metrics import Prequential
from engine.network import Network
from engine.online import OnlineTrainer, augment
from engine.optimizers import make_optimizer
from engine.spec import TRAINING_DEFAULTS

CASES = [("binary", "logistic", "cross_entropy", 1, "sgd", "tanh"),
         ("binary", "logistic", "squared_error", 1, "adam", "relu"),
         ("multiclass", "softmax", "cross_entropy", 3, "adam", "tanh"),
         ("multiclass", "softmax", "cross_entropy", 3, "sgd", "logistic"),
         ("regression", "identity", "squared_error", 1, "sgd", "logistic")]


@pytest.mark.parametrize(("task", "output", "loss", "k", "optimizer", "activation"), CASES)
def test_online_records_allocate_only_a_small_constant(task, output, loss, k, optimizer,
                                                       activation):
    rng = np.random.default_rng(0)
    n = 3000
    X = rng.normal(size=(n, 20))
    y = rng.normal(size=n) if output == "identity" else rng.integers(0, max(k, 2), size=n)
    net = Network.create((20, 32, 16, k), activation, output, rng)
    settings = {**TRAINING_DEFAULTS, "optimizer": optimizer, "nesterov": True}
    trainer = OnlineTrainer(net, make_optimizer(net.params.size, settings), loss)
    metrics = Prequential(task, k)
    columns = augment(X)[:, :, None]
    targets = y.tolist()
    scores = np.empty((n, k)).reshape(-1) if k == 1 else np.empty((n, k))
    trainer.run(columns[:10], targets, targets, scores, metrics)  # warm
    tracemalloc.start()
    try:
        before, _ = tracemalloc.get_traced_memory()
        tracemalloc.reset_peak()
        trainer.run(columns, targets, targets, scores, metrics)
        after, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    # 3000 records: a per-record leak of even one float would show as > 24 kB.
    assert after - before < 512
    assert peak - before < 4096
