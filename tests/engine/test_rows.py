"""Streamed batch training: the epoch order depends on the seed and row positions
only, every epoch visits every training row once, and a source read a block at a
time gives the same weights as arrays in memory."""

from __future__ import annotations

import numpy as np
import pytest

from engine import Learner
from engine.batch import fit
from engine.network import Network
from engine.optimizers import make_optimizer
from engine.rows import ArrayRows, EpochOrder, spans
from engine.spec import TRAINING_DEFAULTS


def problem(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 4))
    y = (X[:, 0] - X[:, 1] * X[:, 2] + 0.3 * rng.normal(size=n) > 0).astype(np.int64)
    return X, y


class ChunkedRows:
    """A source that is not arrays: it keeps its rows in separate chunks of
    ``chunk`` rows (as a store's pages would be), copies what it is asked for,
    and records how wide each read was."""

    def __init__(self, X: np.ndarray, y: np.ndarray, chunk: int) -> None:
        self.parts = [(X[i : i + chunk].copy(), y[i : i + chunk].copy())
                      for i in range(0, len(X), chunk)]
        self.chunk, self.n = chunk, len(X)
        self.widest = 0

    def __len__(self) -> int:
        return self.n

    def take(self, positions: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        if positions.size:
            self.widest = max(self.widest, int(positions[-1] - positions[0] + 1))
        X = np.empty((positions.size, 4))
        y = np.empty(positions.size, dtype=np.int64)
        for i, p in enumerate(positions.tolist()):
            part = self.parts[p // self.chunk]
            X[i], y[i] = part[0][p % self.chunk], part[1][p % self.chunk]
        return X, y


def trained(rows, settings, **kwargs) -> tuple[Network, object]:
    net = Network.create((4, 8, 1), "tanh", "logistic", np.random.default_rng(0))
    opt = make_optimizer(net.params.size, settings)
    net.bind_(opt.params)
    return net, fit(net, opt, "cross_entropy", rows, settings, **kwargs)


SETTINGS = {**TRAINING_DEFAULTS, "max_epochs": 4, "patience": 10, "batch_size": 16,
            "validation_fraction": 0.2}


def test_one_block_streamed_equals_arrays_in_memory_bit_for_bit():
    X, y = problem(500)
    in_memory, report = trained(ArrayRows(X, y), SETTINGS)
    streamed, streamed_report = trained(ChunkedRows(X, y, chunk=37), SETTINGS)
    assert np.array_equal(in_memory.params, streamed.params)
    assert report.history == streamed_report.history


@pytest.mark.parametrize("optimizer", ["sgd", "adam"])
def test_the_read_chunk_size_changes_nothing_with_many_blocks(optimizer):
    X, y = problem(700)
    settings = {**SETTINGS, "optimizer": optimizer}
    blocks = {"block_rows": 50, "buffer_blocks": 3}  # 560 training rows: 12 blocks
    reference, _ = trained(ArrayRows(X, y), settings, **blocks)
    for chunk in (1, 13, 64, 700):
        source = ChunkedRows(X, y, chunk)
        net, _ = trained(source, settings, **blocks)
        assert np.array_equal(reference.params, net.params), chunk
        # A read never spans more than a bounded window of positions.
        assert source.widest <= 2 * blocks["block_rows"]
    other, _ = trained(ArrayRows(X, y), {**settings, "seed": 1}, **blocks)
    assert not np.array_equal(reference.params, other.params)


def test_every_epoch_visits_every_training_row_exactly_once():
    train = np.sort(np.random.default_rng(5).choice(1000, size=730, replace=False))
    order = EpochOrder(train, block_rows=64, buffer_blocks=3)
    rng = np.random.default_rng(0)
    epochs = []
    for _ in range(2):
        blocks = [b for buffer in order.buffers(rng) for b in buffer]
        assert sorted(blocks) == list(range(12))
        visited = np.concatenate([order.positions(b) for b in blocks])
        assert np.array_equal(np.sort(visited), train)
        epochs.append(blocks)
    assert epochs[0] != epochs[1]  # a new block order each epoch


def test_spans_cut_sorted_positions_into_bounded_windows():
    positions = np.array([0, 3, 9, 10, 11, 25, 26, 90])
    pieces = list(spans(positions, 10))
    assert np.array_equal(np.concatenate(pieces), positions)
    assert all(p[-1] - p[0] < 10 for p in pieces)
    assert list(spans(positions[:0], 10)) == []


def test_learner_fit_rows_equals_fit_on_arrays_and_counts_the_input_mean():
    X, y = problem(300, seed=3)
    spec = {"task": "binary", "target": "failed", "hidden_layers": [6],
            "features": [{"name": n, "type": "numeric"}
                         for n in ("flow", "pressure", "vibration", "temperature")],
            "training": {"max_epochs": 3, "batch_size": 8}}
    raw = [dict(zip(("flow", "pressure", "vibration", "temperature"), row.tolist(),
                    strict=True)) for row in X]
    a = Learner.create(spec, warmup=raw)
    b = Learner.create(spec, warmup=raw)
    Xe = a.encode(raw)
    a.fit(Xe, y)
    b.fit_rows(ChunkedRows(Xe, y, chunk=7))
    assert np.array_equal(a.network.params, b.network.params)
    assert np.array_equal(a.input_mean, b.input_mean) and a.input_count == 300
