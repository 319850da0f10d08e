"""The attribution passes (engine.input_gradients, on the kernel) agree with the network's
own forward pass and input gradient, and their pooled workspaces follow the weights."""

from __future__ import annotations

import numpy as np
import pytest

from engine.input_gradients import explained_pass, gradient_at
from engine.network import Network

HEAD = {"binary": ("logistic", 1), "multiclass": ("softmax", 3), "regression": ("identity", 1)}


def setup(task: str, hidden: tuple[int, ...], activation: str) -> tuple[Network, np.ndarray]:
    head, outputs = HEAD[task]
    network = Network.create((6, *hidden, outputs), activation, head, np.random.default_rng(1))
    network.params[:] = np.random.default_rng(2).normal(0.0, 0.8, network.params.size)
    return network, np.random.default_rng(3).normal(size=(9, 6))


def many_points(network: Network, rows: np.ndarray, unit: int | None,
                weights: np.ndarray | None = None):
    """The integrated-gradients form: every row forward, all but the last two (x and
    the baseline) backward."""
    work = network.workspace(rows.shape[0], rows.shape[0] - 2)
    try:
        work.examples[...] = rows.T
        return explained_pass(network, work, unit, weights)
    finally:
        network.release(work)


CASES = [(task, hidden, activation) for task in HEAD for hidden in ((), (7,), (8, 5), (6, 5, 4))
         for activation in ("tanh", "logistic", "relu")]


@pytest.mark.parametrize(("task", "hidden", "activation"), CASES)
def test_attribution_passes_equal_the_networks_forward_and_input_gradient(
        task: str, hidden: tuple[int, ...], activation: str) -> None:
    network, rows = setup(task, hidden, activation)
    for unit in range(network.n_outputs):
        values = network.forward(rows)[:, unit]
        expected = network.input_gradient(rows, unit)
        chosen, value, baseline_value, gradients = many_points(network, rows, unit)
        assert chosen == unit
        assert (value, baseline_value) == pytest.approx(tuple(values[-2:]), rel=1e-13)
        np.testing.assert_allclose(gradients.T, expected[:7], rtol=1e-11, atol=1e-14)
        weights = np.linspace(0.1, 1.0, 7)
        summed = many_points(network, rows, unit, weights)[3]
        np.testing.assert_allclose(summed, weights @ expected[:7], rtol=1e-11, atol=1e-14)
        _, value, baseline_value, gradient = gradient_at(network, rows[0], rows[1], unit)
        assert (value, baseline_value) == pytest.approx(tuple(values[:2]), rel=1e-13)
        np.testing.assert_allclose(gradient, expected[0], rtol=1e-11, atol=1e-14)


@pytest.mark.parametrize("hidden", [(), (7,), (8, 5)])
def test_no_unit_picks_the_most_probable_class(hidden: tuple[int, ...]) -> None:
    network, rows = setup("multiclass", hidden, "tanh")
    predicted = network.forward(rows).argmax(axis=1)
    for r in range(4):
        unit, _, _, gradient = gradient_at(network, rows[r], rows[r + 1], None)
        assert unit == predicted[r]
        np.testing.assert_allclose(gradient, network.input_gradient(rows[r], unit)[0],
                                   rtol=1e-11, atol=1e-14)
    assert many_points(network, rows, None)[0] == predicted[-2]
    for task in ("binary", "regression"):
        network, rows = setup(task, hidden, "tanh")
        assert gradient_at(network, rows[0], rows[1], None)[0] == 0


def test_pooled_workspaces_follow_the_weights_and_serve_concurrent_callers() -> None:
    """The network keeps workspaces (buffers and views) between calls: they must see
    weights changed in place, parameters moved to new storage, and never be shared
    by two threads at once (the API explains from several threads)."""
    import threading

    network, rows = setup("binary", (8, 5), "tanh")
    fresh = network.copy()
    gradient_at(network, rows[0], rows[1], 0)  # a workspace is now kept
    network.params *= 0.5
    fresh.params *= 0.5
    expected = fresh.input_gradient(rows[2], 0)[0]
    np.testing.assert_allclose(gradient_at(network, rows[2], rows[3], 0)[3], expected,
                               rtol=1e-11, atol=1e-14)
    storage = np.zeros_like(network.params)
    network.bind_(storage)
    storage *= -1.0
    fresh.params *= -1.0
    np.testing.assert_allclose(gradient_at(network, rows[2], rows[3], 0)[3],
                               fresh.input_gradient(rows[2], 0)[0], rtol=1e-11, atol=1e-14)

    expected_all = [gradient_at(network, rows[r], rows[r - 1], 0) for r in range(1, 9)]
    failures: list[int] = []

    def work(offset: int) -> None:
        for k in range(400):
            r = 1 + (k + offset) % 8
            unit, value, base_value, gradient = gradient_at(network, rows[r], rows[r - 1], 0)
            want = expected_all[r - 1]
            if (value, base_value) != want[1:3] or not np.array_equal(gradient, want[3]):
                failures.append(r)
            if k % 50 == 0:  # other shapes come and go from the pool meanwhile
                network.forward(rows[: 1 + k % 7])

    import sys

    interval = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)  # switch threads often, inside the passes too
    try:
        threads = [threading.Thread(target=work, args=(t,)) for t in range(4)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()
    finally:
        sys.setswitchinterval(interval)
    assert failures == []


def test_the_pool_keeps_a_bounded_number_of_shapes() -> None:
    from engine.network import POOL_BYTES, POOL_DEPTH, POOL_SHAPES

    network, rows = setup("multiclass", (8,), "tanh")
    for n in range(1, POOL_SHAPES + 5):
        network.forward(np.resize(rows, (n, 6)))
    kept = network._pool
    assert len(kept) == POOL_SHAPES and all(len(v) <= POOL_DEPTH for v in kept.values())
    assert (POOL_SHAPES + 4, POOL_SHAPES + 4) in kept and (1, 1) not in kept  # oldest out
    network.forward(np.zeros((POOL_BYTES // 8, 6)))
    assert all(w.nbytes <= POOL_BYTES for v in kept.values() for w in v)
