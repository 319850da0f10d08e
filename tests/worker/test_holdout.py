"""The holdout window keeps exactly the latest rows, in order (a ring buffer:
common practice, no source; checked against slicing the whole stream)."""

from __future__ import annotations

import numpy as np

from service.versions.holdout import HoldoutWindow


def test_the_window_holds_the_latest_rows_in_sequence_order() -> None:
    rng = np.random.default_rng(7)
    for capacity in (1, 3, 10):
        window = HoldoutWindow(capacity)
        stream_X, stream_Y = np.empty((0, 2)), np.empty(0, dtype=np.int64)
        for _ in range(40):
            n = int(rng.integers(0, 2 * capacity + 2))
            X, Y = rng.normal(size=(n, 2)), rng.integers(0, 3, size=n)
            window.extend(X, Y)
            stream_X, stream_Y = np.vstack([stream_X, X]), np.concatenate([stream_Y, Y])
            got_X, got_Y = window.arrays()
            assert window.size == min(capacity, len(stream_X))
            if window.size:
                assert np.array_equal(got_X, stream_X[-capacity:])
                assert np.array_equal(got_Y, stream_Y[-capacity:])


def test_the_rows_the_window_drops_are_handed_back_in_order() -> None:
    rng = np.random.default_rng(8)
    for capacity in (1, 4, 9):
        window = HoldoutWindow(capacity)
        kept, dropped = [], []
        for _ in range(30):
            n = int(rng.integers(0, 2 * capacity + 2))
            X, Y = rng.normal(size=(n, 2)), rng.integers(0, 3, size=n)
            out_X, out_Y = window.extend(X, Y)
            dropped.extend(out_X.tolist())
            kept.extend(X.tolist())
            assert len(out_X) == len(out_Y)
        # Everything that went in is either still held or was handed back, in order.
        held, _ = window.arrays()
        assert dropped + held.tolist() == kept
