"""A retrain's encoded training rows in a temporary file, read back by positions.

A retrain decodes each stored record once: the records are streamed from the
database a chunk per query, encoded, and appended here in sequence order (so
row position p is the p-th train record). Every epoch then reads its blocks
from this file (engine/rows.py ``Rows``), never from the database again:
decoding the JSON of 5,000,000 records takes tens of seconds, reading back the
840 MB of float64 rows from the page cache well under one.

Why ``pread`` into a reused buffer and not a ``numpy.memmap``: the pages of a
file mapping the process has touched count in its resident set (``VmHWM``,
``ru_maxrss``) until the kernel takes them back, so an epoch over a mapped file
would show the whole file as the worker's memory. Pages read with ``pread``
stay in the kernel's page cache, which is shared, reclaimable and not the
process's. The file is unnamed (unlinked at once: ``tempfile.TemporaryFile``
in the worker's temporary directory, ``TMPDIR``), so a killed worker leaves
nothing behind; closing it frees the space.
"""

from __future__ import annotations

import os
import tempfile
from typing import Any

import numpy as np
from numpy.typing import NDArray

ROW_DTYPE = np.dtype(np.float64)


class EncodedRowsFile:
    """``n`` rows of ``width`` float64 inputs and one target each, filled in
    position order by :meth:`append`, then read by :meth:`take`."""

    def __init__(self, n: int, width: int, target_dtype: np.dtype[Any],
                 directory: str | None = None) -> None:
        self.n, self.width = n, width
        self.target_dtype = np.dtype(target_dtype)
        self.filled = 0
        # Open for the object's life, closed by close() (or the with block).
        self._file = tempfile.TemporaryFile(  # noqa: SIM115
            prefix="keelson-retrain-", dir=directory)
        self._fd = self._file.fileno()
        self._row_bytes = width * ROW_DTYPE.itemsize
        self._targets_at = n * self._row_bytes
        os.ftruncate(self._fd, self._targets_at + n * self.target_dtype.itemsize)
        # Read buffers, grown to the widest range asked for and then reused.
        self._X = np.empty((0, width), dtype=ROW_DTYPE)
        self._y = np.empty(0, dtype=self.target_dtype)

    def __len__(self) -> int:
        return self.filled

    def __enter__(self) -> EncodedRowsFile:
        return self

    def __exit__(self, *_: object) -> None:
        self.close()

    def close(self) -> None:
        self._file.close()

    def append(self, X: NDArray[np.float64], y: NDArray[Any]) -> None:
        """The next rows, in position order."""
        if self.filled + len(X) > self.n:
            raise ValueError(f"more than the {self.n} rows this file was made for")
        X = np.ascontiguousarray(X, dtype=ROW_DTYPE)
        y = np.ascontiguousarray(y, dtype=self.target_dtype)
        _write(self._fd, X, self.filled * self._row_bytes)
        _write(self._fd, y, self._targets_at + self.filled * self.target_dtype.itemsize)
        self.filled += len(X)

    def take(self, positions: NDArray[np.intp]) -> tuple[NDArray[np.float64], NDArray[Any]]:
        """The rows at sorted ``positions``: their whole range read in one call
        (the engine bounds it), then picked out (copies the caller keeps)."""
        if not positions.size:
            return np.empty((0, self.width)), np.empty(0, dtype=self.target_dtype)
        first, stop = int(positions[0]), int(positions[-1]) + 1
        if not 0 <= first < stop <= self.filled:
            raise IndexError(f"rows {first}..{stop - 1} are not in the file")
        count = stop - first
        if self._X.shape[0] < count:
            self._X = np.empty((count, self.width), dtype=ROW_DTYPE)
            self._y = np.empty(count, dtype=self.target_dtype)
        X, y = self._X[:count], self._y[:count]
        _read(self._fd, X, first * self._row_bytes)
        _read(self._fd, y, self._targets_at + first * self.target_dtype.itemsize)
        if count == positions.size:  # every row of the range: one copy, no gather
            return X.copy(), y.copy()
        local = positions - first
        return X[local], y[local]


def _write(fd: int, array: NDArray[Any], offset: int) -> None:
    view = array.data.cast("B")
    while view:
        written = os.pwrite(fd, view, offset)
        view, offset = view[written:], offset + written


def _read(fd: int, array: NDArray[Any], offset: int) -> None:
    view = array.data.cast("B")
    while view:
        got = os.preadv(fd, [view], offset)
        if got == 0:
            raise OSError("the retrain's row file ended early")
        view, offset = view[got:], offset + got
