"""The holdout window a lineage evaluates its versions on.

Versions are judged on the latest ``capacity`` holdout records at or before
their cursor (default 10,000: a bounded window, so evaluation costs the same
after a million records as after ten thousand, and it follows the newest data).
The window is kept encoded in memory and filled from the stream the worker
reads anyway, so a checkpoint's evaluation reads nothing from the database.
Its encoding belongs to one encoder (one lineage's frozen statistics).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np
from numpy.typing import NDArray


class HoldoutWindow:
    """A ring buffer of the latest encoded holdout rows (mutated by ``extend``)."""

    def __init__(self, capacity: int) -> None:
        self.capacity = capacity
        self._X: NDArray[np.float64] | None = None
        self._Y: NDArray[Any] | None = None
        self._start = 0  # index of the oldest row once the buffer is full
        self.size = 0

    def extend(
        self, X: NDArray[np.float64], Y: NDArray[Any]
    ) -> tuple[NDArray[np.float64], NDArray[Any]]:
        """Append rows (in sequence order), dropping the oldest past capacity;
        returns the rows dropped (copies), so running sums can let them go."""
        if len(X) == 0 or self.capacity == 0:
            return X[:0], Y[:0]
        if self._X is None or self._Y is None:
            # Preallocated once at the full size: appending never reallocates.
            self._X = np.empty((self.capacity, X.shape[1]), dtype=X.dtype)
            self._Y = np.empty((self.capacity, *Y.shape[1:]), dtype=Y.dtype)
        overflow = self.size + len(X) - self.capacity
        old = min(max(overflow, 0), self.size)
        at = (self._start + np.arange(old)) % self.capacity
        dropped_X, dropped_Y = self._X[at], self._Y[at]
        if len(X) > self.capacity:
            skipped = len(X) - self.capacity
            dropped_X = np.concatenate([dropped_X, X[:skipped]])
            dropped_Y = np.concatenate([dropped_Y, Y[:skipped]])
            X, Y = X[skipped:], Y[skipped:]
        end = (self._start + self.size) % self.capacity
        first = min(len(X), self.capacity - end)  # up to the end of the buffer,
        self._X[end : end + first] = X[:first]
        self._Y[end : end + first] = Y[:first]
        rest = len(X) - first  # then from its start (len(X) <= capacity)
        self._X[:rest] = X[first:]
        self._Y[:rest] = Y[first:]
        grown = self.size + len(X)
        if grown > self.capacity:
            self._start = (self._start + grown - self.capacity) % self.capacity
        self.size = min(grown, self.capacity)
        return dropped_X, dropped_Y

    def arrays(self) -> tuple[NDArray[np.float64], NDArray[Any]]:
        """The rows in sequence order (a copy once the ring has wrapped)."""
        if self._X is None or self._Y is None or self.size == 0:
            return np.empty((0, 0)), np.empty(0)
        if self._start == 0:
            return self._X[: self.size], self._Y[: self.size]
        order = np.r_[self._start : self.capacity, 0 : self._start]
        return self._X[order], self._Y[order]


# Records per query when a window is read from the store (a retrain's, or one
# in another encoding): one chunk of Python records at a time, whatever the capacity.
HOLDOUT_CHUNK = 5_000


def fill_window(window: HoldoutWindow, learner: Any, chunks: Iterable[Any]) -> None:
    """Encode record chunks (in sequence order) into the window one at a time."""
    for chunk in chunks:
        window.extend(learner.encode(chunk.features), learner.encode_labels(chunk.labels))


def evaluate(learner: Any, window: HoldoutWindow) -> dict[str, float | None]:
    """The learner's holdout metrics on the window ({} when it is empty)."""
    if window.size == 0:
        return {}
    X, Y = window.arrays()
    return json_metrics(learner.evaluate(X, Y))


def json_metrics(metrics: Mapping[str, Any]) -> dict[str, float | None]:
    """Metrics as JSON numbers: an undefined one (NaN, e.g. before any record)
    becomes null, since JSON has no NaN (RFC 8259); ``n``, a count of rows,
    is a whole number."""
    plain: dict[str, float | None] = {}
    for key, value in metrics.items():
        number = float(value)
        plain[key] = None if not math.isfinite(number) else int(number) if key == "n" else number
    return plain
