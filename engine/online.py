"""Online training: one record, one backpropagation step, scored before it is learnt.

Per record, one forward and one backward pass of engine.kernel on a workspace
for one example, built once, whose gradient is the optimizer's, then one
optimizer step. The records are read as columns of the augmented inputs (a
trailing 1 multiplies the bias row), so nothing is copied per record and
nothing grows with the records.

A single-output network backpropagates dz/dparams (z the output unit's
pre-activation) and lets the optimizer multiply by the scalar dLoss/dz, which
the head's and the loss's scalar forms give in Python floats: that folds the
loss into one coefficient instead of one pass per layer. A softmax network
starts its backward pass from dLoss/dz = p - onehot(t).

The optimizer may move the weights between rows of its buffer as it steps (see
Optimizer.begin_run); the workspace keeps views of each row, and each step says
which row is live.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine import heads, kernel
from engine.activations import HEADS
from engine.errors import InvalidInputError, NonFiniteError
from engine.kernel import Workspace
from engine.metrics import Prequential
from engine.network import Network
from engine.optimizers import Optimizer

Array = NDArray[np.float64]


def augment(X: Array) -> Array:
    """X (n, d) -> (n, d + 1) with a trailing column of ones (the bias input)."""
    out = np.empty((X.shape[0], X.shape[1] + 1))
    out[:, :-1] = X
    out[:, -1] = 1.0
    return out


class OnlineTrainer:
    """Applies records one at a time to `network` with `optimizer` (binds them together)."""

    def __init__(self, network: Network, optimizer: Optimizer, loss: str) -> None:
        heads.check_head(network.output, loss)
        network.bind_(optimizer.params)
        optimizer.params_changed()
        self.network, self.optimizer, self.loss = network, optimizer, loss
        self.n_outputs = network.sizes[-1]
        self._work = Workspace(network, 1, grad=optimizer.grad,
                               weight_rows=optimizer.weight_rows)
        head = HEADS[network.output]
        self._value = head.value  # the scalar form of a single-output head
        self._scalar_delta = heads.SCALAR_DELTA.get((network.output, loss))
        self._activate = head.activate_
        self._identity = network.output == "identity"

    def learn(self, X: Array, y: NDArray[Any], scores: Array,
              metrics: Prequential | None = None,
              target_center: float = 0.0, target_scale: float = 1.0) -> int:
        """Score then train on each row of X (n, d) in order; returns the rows applied.

        Writes the pre-step head outputs into `scores` (n, k) (regression values in raw
        units: v * target_scale + target_center) and folds them into `metrics`.
        A non-finite step raises NonFiniteError with `.applied` set; the network,
        optimizer and metrics are then as they were after the last applied row.
        """
        n = int(X.shape[0])
        if n == 0:
            return 0
        columns = augment(X)[:, :, None]  # record i is the column columns[i]
        raw_targets = (y * target_scale + target_center) if self._identity else y
        flat_scores = scores.reshape(-1) if self.n_outputs == 1 else scores
        # Overflow is detected on scalars and raised as NonFiniteError; no warnings.
        with np.errstate(over="ignore", invalid="ignore"):
            self.run(columns, y.tolist(), raw_targets.tolist(), flat_scores, metrics,
                     target_center, target_scale)
        return n

    def run(self, columns: Array, targets: list[Any], raw_targets: list[Any],
            flat_scores: Array, metrics: Prequential | None,
            target_center: float = 0.0, target_scale: float = 1.0) -> None:
        """`learn` on records given as columns (n, d + 1, 1) of augmented inputs, with
        targets as lists; `flat_scores` is (n,) for a single output."""
        step, live = self.optimizer.begin_run()
        try:
            if self._value is not None:
                self._scalar_loop(columns, targets, raw_targets, flat_scores, metrics,
                                  target_center, target_scale, step, live)
            else:
                self._vector_loop(columns, targets, raw_targets, flat_scores, metrics,
                                  step, live)
        finally:
            self.optimizer.end_run()

    def _scalar_loop(self, columns: Array, targets: list[Any], raw_targets: list[Any],
                     flat_scores: Array, metrics: Prequential | None,
                     target_center: float, target_scale: float,
                     step: Callable[[float], int], live: int) -> None:
        """A single-output head: the output and dLoss/dz in Python floats."""
        work = self._work
        logits = work.logits
        forward, backward = kernel.forward, kernel.backward
        value, scalar_delta = self._value, self._scalar_delta
        assert value is not None and scalar_delta is not None
        isfinite = math.isfinite
        identity = self._identity
        record = None if metrics is None else metrics.scalar_update()
        i = 0
        try:
            for i in range(columns.shape[0]):
                x = columns[i]
                forward(work, x, live)
                z = logits.item()
                if not isfinite(z):
                    raise NonFiniteError("the network output is not finite")
                result = value(z)
                backward(work, x, live, 1.0)  # dz/dparams
                live = step(scalar_delta(result, targets[i]))  # scaled by dLoss/dz
                if identity:
                    result = result * target_scale + target_center
                flat_scores[i] = result
                if record is not None:
                    record(raw_targets[i], result)
        except NonFiniteError as exc:
            raise NonFiniteError(f"record {i}: {exc}", applied=i) from exc

    def _vector_loop(self, columns: Array, targets: list[Any], raw_targets: list[Any],
                     flat_scores: Array, metrics: Prequential | None,
                     step: Callable[[float], int], live: int) -> None:
        """A softmax head: dLoss/dz = p - onehot(t) starts the backward pass. A
        non-finite output makes the gradient non-finite, which the step refuses."""
        work = self._work
        forward, backward = kernel.forward, kernel.backward
        outputs, p, delta = work.outputs, work.logits[:, 0], work.delta
        activate, copyto = self._activate, np.copyto
        update = None if metrics is None else metrics.update
        i = 0
        try:
            for i in range(columns.shape[0]):
                x = columns[i]
                forward(work, x, live)
                activate(outputs)  # the logits become p in place
                copyto(delta, work.logits)
                delta[targets[i], 0] -= 1.0  # softmax + cross-entropy: dL/dz = p - onehot
                backward(work, x, live)
                live = step(1.0)
                flat_scores[i] = p
                if update is not None:
                    update(raw_targets[i], p)
        except NonFiniteError as exc:
            raise NonFiniteError(f"record {i}: {exc}", applied=i) from exc


def check_targets(y: NDArray[Any], n: int, n_outputs: int, output: str) -> NDArray[Any]:
    """Targets as int64 class indices or finite float64 values; InvalidInputError if not."""
    y = np.asarray(y)
    if y.shape != (n,):
        raise InvalidInputError(f"expected {n} labels, got shape {y.shape}", field="label")
    if output == "identity":
        y = y.astype(np.float64)
        if not np.all(np.isfinite(y)):
            raise InvalidInputError("regression targets must be finite", field="label")
        return y
    if not np.issubdtype(y.dtype, np.integer):
        raise InvalidInputError("class targets must be integer indices", field="label")
    classes = 2 if output == "logistic" else n_outputs
    if n and (y.min() < 0 or y.max() >= classes):
        raise InvalidInputError("a class index is outside the classes", field="label")
    return y.astype(np.int64)
