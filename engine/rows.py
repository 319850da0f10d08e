"""Training rows the batch trainer reads, and the order an epoch visits them in.

The batch trainer never holds more than a bounded part of the rows: it asks a
:class:`Rows` source for the rows at sorted positions, a block at a time. In
memory that is :class:`ArrayRows` (views of two arrays); the worker gives it a
file of encoded rows. The engine knows nothing of where the rows live.

The order is a function of the seed and the row positions only, never of how a
source reads (docs/architecture.md, "Retraining over millions of records"):

* the training positions are cut into fixed blocks of ``block_rows``
  consecutive training rows (block k: the k-th ``block_rows`` of them);
* each epoch draws a permutation of the blocks, and takes them
  ``buffer_blocks`` at a time, in that order, into a buffer;
* each buffer's rows are shuffled by a permutation drawn for it, and the
  epoch's mini-batches are cut from the buffers one after another (a batch may
  run from one buffer into the next, so only the epoch's last batch is short).

With one block (every fit of at most ``block_rows`` training rows) no block
permutation is drawn and the one buffer is every row: a uniform permutation of
the epoch, exactly as a fit of arrays in memory always was.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any, Protocol

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]
Positions = NDArray[np.intp]

# Rows per block: the unit of the epoch order. Part of the result (a fit's order
# depends on it), so it is fixed here, not a deployment setting.
BLOCK_ROWS = 32_768
# Blocks shuffled together: the buffer a mini-batch is drawn from holds
# BUFFER_BLOCKS * BLOCK_ROWS rows (262,144; 44 MB of 20-input rows).
BUFFER_BLOCKS = 8


class Rows(Protocol):
    """Rows in position order (0 .. len - 1), read by sorted positions."""

    def __len__(self) -> int: ...

    def take(self, positions: Positions) -> tuple[Array, NDArray[Any]]:
        """(X (m, d), y (m,)) of the rows at ``positions`` (sorted, increasing),
        as arrays the caller may keep."""
        ...


class ArrayRows:
    """Rows held in memory: two arrays."""

    def __init__(self, X: Array, y: NDArray[Any]) -> None:
        self.X, self.y = X, y

    def __len__(self) -> int:
        return int(self.X.shape[0])

    def take(self, positions: Positions) -> tuple[Array, NDArray[Any]]:
        return self.X[positions], self.y[positions]


def spans(positions: Positions, width: int) -> Iterator[Positions]:
    """Sorted ``positions`` in pieces, each within ``width`` consecutive positions:
    what a source reads for one piece is bounded whatever the positions."""
    if not positions.size:
        return
    edges = np.searchsorted(positions, np.arange(0, int(positions[-1]) + width + 1, width))
    for start, stop in zip(edges[:-1], edges[1:], strict=True):
        if stop > start:
            yield positions[start:stop]


def take_all(rows: Rows, positions: Positions, width: int) -> tuple[Array, NDArray[Any]]:
    """The rows at sorted ``positions``, read ``width`` positions at a time
    into one array (filled a read at a time: no second copy of them all)."""
    return _gather(rows, list(spans(positions, width)), positions.size)


def _gather(rows: Rows, pieces: list[Positions], total: int) -> tuple[Array, NDArray[Any]]:
    if not pieces:
        return rows.take(np.empty(0, dtype=np.intp))
    X: Array | None = None
    y: NDArray[Any] | None = None
    at = 0
    for piece in pieces:
        X_part, y_part = rows.take(piece)
        if X is None or y is None:
            X = np.empty((total, X_part.shape[1]), dtype=X_part.dtype)
            y = np.empty(total, dtype=y_part.dtype)
        X[at : at + piece.size], y[at : at + piece.size] = X_part, y_part
        at += piece.size
    assert X is not None and y is not None
    return X, y


class EpochOrder:
    """The buffers of one fit's epochs (see the module docstring)."""

    def __init__(self, train: Positions, block_rows: int = BLOCK_ROWS,
                 buffer_blocks: int = BUFFER_BLOCKS) -> None:
        self.train = train
        self.block_rows, self.buffer_blocks = block_rows, buffer_blocks
        self.blocks = max(1, -(-train.size // block_rows))

    def buffers(self, rng: np.random.Generator) -> Iterator[list[int]]:
        """Block indices of each buffer of one epoch, in order (draws the block
        permutation from ``rng``; none for a single block)."""
        if self.blocks == 1:
            yield [0]
            return
        order = rng.permutation(self.blocks).tolist()
        for start in range(0, self.blocks, self.buffer_blocks):
            yield order[start : start + self.buffer_blocks]

    def positions(self, block: int) -> Positions:
        return self.train[block * self.block_rows : (block + 1) * self.block_rows]

    def read(self, rows: Rows, blocks: list[int]) -> tuple[Array, NDArray[Any]]:
        """The rows of ``blocks``, block after block in the order given, in one array."""
        # A block's positions span about block_rows / (1 - validation fraction):
        # read as one piece when they fit twice that, else in pieces.
        pieces = [piece for block in blocks
                  for piece in spans(self.positions(block), 2 * self.block_rows)]
        return _gather(rows, pieces, sum(piece.size for piece in pieces))
