"""Batch training: mini-batch epochs, a validation split, early stopping, cancel hook.

Everything random (the validation split, the order of each epoch) comes from one
Generator made from the spec's seed, so a fit is reproducible. The rows come
from a source read a block at a time (engine/rows.py): arrays in memory are the
case of a source whose blocks are views, and a fit of at most one block's rows
shuffles each epoch with one uniform permutation. Early stopping
watches the mean validation loss (the training loss when there is no
validation split) and restores the parameters of the best epoch.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine import heads
from engine import rows as epoch_rows
from engine.errors import NonFiniteError, TrainingCancelled
from engine.kernel import Workspace
from engine.network import Network, mean_loss_gradient
from engine.optimizers import Optimizer
from engine.rows import EpochOrder, Rows, take_all

Array = NDArray[np.float64]
Progress = Callable[[int, float, float | None], None]
# An epoch counts as an improvement when it lowers the monitored loss by this fraction.
MIN_IMPROVEMENT = 1e-4


@dataclass(frozen=True)
class FitReport:
    """What a batch fit did. Losses are mean per-example losses (training: over the
    epoch's batches; validation: on the held-back rows, None without a split)."""

    epochs: int
    best_epoch: int
    train_loss: float
    validation_loss: float | None
    stopped_early: bool
    n_train: int
    n_validation: int
    history: list[tuple[int, float, float | None]] = field(default_factory=list)


def split_validation(n: int, fraction: float,
                     rng: np.random.Generator) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """Row indices (train, validation); the validation part holds round(fraction * n) rows,
    none when that leaves fewer than 2 on either side."""
    order = rng.permutation(n)
    n_val = int(round(fraction * n))
    if n_val < 2 or n - n_val < 2:
        return np.arange(n), order[:0]
    return np.sort(order[n_val:]), np.sort(order[:n_val])


def mean_loss(network: Network, loss: str, X: Array, y: NDArray[Any]) -> float:
    """Mean per-example loss of the network on (X, y)."""
    return float(heads.losses(network.output, loss, network.logits(X), y).mean())


def _summed_loss(network: Network, loss: str, X: Array, y: NDArray[Any],
                 slice_rows: int) -> float:
    """Mean loss over (X, y), a forward pass on ``slice_rows`` rows at a time
    (the layer outputs of half a million rows would be hundreds of MB). One
    slice is :func:`mean_loss` to the bit: a sum, then divided by n."""
    total = 0.0
    for start in range(0, X.shape[0], slice_rows):
        stop = start + slice_rows
        total += float(heads.losses(network.output, loss, network.logits(X[start:stop]),
                                    y[start:stop]).sum())
    return total / int(X.shape[0])


def fit(network: Network, optimizer: Optimizer, loss: str, rows: Rows,
        training: Mapping[str, Any], *, progress: Progress | None = None,
        cancel: Callable[[], bool] | None = None, block_rows: int | None = None,
        buffer_blocks: int | None = None) -> FitReport:
    """Train `network` (bound to `optimizer`'s parameters) on `rows` in place.

    The rows are read a buffer at a time in the order engine/rows.py defines
    from the seed (``ArrayRows(X, y)`` for arrays in memory); the validation
    rows are held in memory. Raises TrainingCancelled when cancel() returns
    True (checked before every epoch) and NonFiniteError if a step would be
    non-finite; either way the network holds the parameters it had when the
    error came (callers fit on copies). ``block_rows`` and ``buffer_blocks``
    default to engine/rows.py's (read at the call: tests make them small).
    """
    block_rows = block_rows or epoch_rows.BLOCK_ROWS
    buffer_blocks = buffer_blocks or epoch_rows.BUFFER_BLOCKS
    rng = np.random.default_rng(int(training["seed"]))
    train, val = split_validation(len(rows), float(training["validation_fraction"]), rng)
    X_val, y_val = take_all(rows, val, 2 * block_rows)
    order = EpochOrder(train, block_rows, buffer_blocks)
    batch_size = int(training["batch_size"])
    patience = int(training["patience"])
    n = train.size
    d = network.sizes[0]
    # One workspace per batch shape (the last batch of an epoch may be shorter).
    work = {size: Workspace(network, size, grad=optimizer.grad)
            for size in {min(batch_size, n), n % batch_size or min(batch_size, n)}}
    best = math.inf
    best_epoch = 0
    best_params = network.params.copy()
    history: list[tuple[int, float, float | None]] = []
    stale = 0
    epoch = 0
    train_loss = math.nan
    val_loss: float | None = None
    for epoch in range(1, int(training["max_epochs"]) + 1):
        if cancel is not None and cancel():
            raise TrainingCancelled(f"cancelled before epoch {epoch}")
        total = 0.0
        # Rows of the previous buffer short of a whole batch, carried into the next.
        carry: tuple[Array, NDArray[Any]] | None = None
        with np.errstate(over="ignore", invalid="ignore"):  # non-finite: raised below
            buffers = list(order.buffers(rng))
            for index, blocks in enumerate(buffers):
                X_buf, y_buf = order.read(rows, blocks)
                shuffle = rng.permutation(X_buf.shape[0])
                kept = 0 if carry is None else carry[1].shape[0]
                m = kept + X_buf.shape[0]
                # Examples are columns for the kernel: the shuffled rows, transposed,
                # with a row of ones (the bias input) below them; batches are views.
                inputs = np.ones((d + 1, m))
                y_epoch = np.empty(m, dtype=y_buf.dtype)
                if carry is not None:
                    inputs[:-1, :kept], y_epoch[:kept] = carry
                # Gathered straight into the transposed inputs (mode="clip": the
                # indices are valid, and it spares np.take a buffered copy).
                np.take(X_buf, shuffle, axis=0, out=inputs[:-1, kept:].T, mode="clip")
                np.take(y_buf, shuffle, out=y_epoch[kept:], mode="clip")
                del X_buf, y_buf, shuffle
                usable = m if index == len(buffers) - 1 else m - m % batch_size
                for start in range(0, usable, batch_size):
                    stop = min(start + batch_size, usable)
                    batch_loss = mean_loss_gradient(work[stop - start],
                                                    inputs[:, start:stop],
                                                    y_epoch[start:stop], network.output, loss)
                    if not math.isfinite(batch_loss):
                        raise NonFiniteError(f"epoch {epoch}: the loss is not finite")
                    optimizer.step_()
                    total += batch_loss * (stop - start)
                carry = (inputs[:-1, usable:].copy(), y_epoch[usable:].copy()) \
                    if usable < m else None
                del inputs, y_epoch  # before the next buffer is read
        train_loss = total / n
        val_loss = _summed_loss(network, loss, X_val, y_val, block_rows) if val.size else None
        monitored = train_loss if val_loss is None else val_loss
        if not math.isfinite(monitored):
            raise NonFiniteError(f"epoch {epoch}: the monitored loss is not finite")
        history.append((epoch, train_loss, val_loss))
        if progress is not None:
            progress(epoch, train_loss, val_loss)
        # Losses are >= 0: a relative threshold suits every scale of target.
        if best == math.inf or monitored < best * (1.0 - MIN_IMPROVEMENT):
            best, best_epoch, stale = monitored, epoch, 0
            best_params[...] = network.params
        else:
            stale += 1
            if stale >= patience:
                break
    network.params[...] = best_params
    optimizer.params_changed()
    return FitReport(
        epochs=epoch, best_epoch=best_epoch, train_loss=train_loss,
        validation_loss=None if val_loss is None else best,
        stopped_early=stale >= patience, n_train=n, n_validation=int(val.size),
        history=history,
    )
