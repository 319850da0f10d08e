"""A forward pass over many rows, run a block at a time, gives the same
outputs as one row at a time: each output is the same dot products whatever
the batch (common practice, no source: the column split of a matrix product
does not change any one column's sums)."""

from __future__ import annotations

import numpy as np
import pytest

from engine.network import BLOCK_ROWS, Network


@pytest.mark.parametrize("sizes", [(20, 32, 16, 1), (7, 16, 8, 3), (3, 5, 1)])
@pytest.mark.parametrize("rows", [BLOCK_ROWS + 1, 3 * BLOCK_ROWS, 10 * BLOCK_ROWS + 17])
def test_blocked_logits_equal_row_by_row_logits(sizes: tuple[int, ...], rows: int) -> None:
    rng = np.random.default_rng(rows)
    network = Network(sizes, "tanh", "softmax" if sizes[-1] > 1 else "logistic")
    network.params[:] = rng.normal(size=network.params.size) * 0.5
    X = rng.normal(size=(rows, sizes[0]))
    together = network.logits(X)
    assert together.shape == (rows, sizes[-1])
    one_by_one = np.vstack([network.logits(X[i:i + 1]) for i in range(rows)])
    np.testing.assert_allclose(together, one_by_one, rtol=1e-12, atol=1e-12)
    # Twice in a row (the pooled workspace reused, its stale columns ignored): the same.
    assert np.array_equal(network.logits(X), together)


def test_a_wide_network_uses_blocks_the_pool_keeps() -> None:
    network = Network((300, 256, 1), "tanh", "logistic")
    assert 1 <= network._block_rows() < BLOCK_ROWS
