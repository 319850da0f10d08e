"""Online training: one record, one backpropagation step, scored before it is learnt.

The per-record path works in buffers allocated once: the hidden activations
of all layers side by side (each followed by a constant 1 that multiplies the
bias row), their derivatives, the deltas, and the gradient, which is a row of
the optimizer's buffer. Every NumPy call writes into its `out` argument (given
positionally: keyword parsing costs as much as a small array operation), and
single-output heads run in Python floats. Nothing grows with the records.

A single-output network backpropagates d z / d params (z the output unit's
pre-activation) and lets the optimizer multiply by the scalar dLoss/dz: that
folds the loss into one coefficient instead of one pass per layer.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine import heads
from engine.activations import ACTIVATE, DERIVATIVE
from engine.errors import InvalidInputError, NonFiniteError
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


def _relu_into(z: Array, out: Array) -> None:
    np.maximum(z, 0.0, out=out)


def _logistic_into(z: Array, out: Array) -> None:
    if out is not z:
        np.copyto(out, z)
    ACTIVATE["logistic"](out)


# f(z, out) forms: np.tanh itself for tanh, saving a Python call per layer.
_ACTIVATE_INTO: dict[str, Callable[[Array, Array], object]] = {
    "tanh": np.tanh, "relu": _relu_into, "logistic": _logistic_into}


class OnlineTrainer:
    """Applies records one at a time to `network` with `optimizer` (binds them together)."""

    def __init__(self, network: Network, optimizer: Optimizer, loss: str) -> None:
        heads.check_head(network.output, loss)
        network.bind_(optimizer.params)
        optimizer.params_changed()
        self.network, self.optimizer, self.loss = network, optimizer, loss
        hidden = network.sizes[1:-1]
        k = network.sizes[-1]
        self.n_outputs = k
        last = len(network.layers) - 1
        self._last = last
        # Hidden activations side by side, each followed by a 1 (never overwritten).
        self._hidden = np.ones(sum(h + 1 for h in hidden))
        self._slopes_all = np.empty_like(self._hidden)
        acts, cores, slopes, offset = [], [], [], 0
        for h in hidden:
            acts.append(self._hidden[offset : offset + h + 1])
            cores.append(self._hidden[offset : offset + h])
            slopes.append(self._slopes_all[offset : offset + h])
            offset += h + 1
        self._act_columns = [a[:, None] for a in acts]
        self._deltas = [np.empty(h) for h in hidden] + [np.empty(k)]
        self._delta_rows = [d[None, :] for d in self._deltas]
        self._grads = network._views(optimizer.grad)
        self._z = np.empty(k)
        self._p = np.empty(k)  # head outputs of the current record
        self._activate = ACTIVATE[network.activation]
        self._slope = DERIVATIVE[network.activation]
        self._forward_plan = list(zip(network.layers[:-1], cores, acts, strict=True))
        # Backward plan for hidden layer i, last first: (source, slopes, delta, delta row,
        # column of what feeds the layer (None: the input), gradient block, and the
        # weights and delta one layer down (None at the first layer)). The delta is
        # source * slopes, where source holds the weights times the delta above.
        self._backward_plan: list[tuple[Array, Array, Array, Array, Array | None, Array,
                                        tuple[Array, Array] | None]] = []
        for i in range(last - 1, -1, -1):
            self._backward_plan.append((
                self._deltas[i], slopes[i], self._deltas[i], self._delta_rows[i],
                self._act_columns[i - 1] if i > 0 else None, self._grads[i],
                (network.weights[i], self._deltas[i - 1]) if i > 0 else None))
        # Single output: dz/d(last hidden) is the output weight column, so the first
        # delta is that column times the slopes, straight from the weights.
        self._scalar_plan = list(self._backward_plan)
        if k == 1 and last > 0:
            first = self._scalar_plan[0]
            self._scalar_plan[0] = (network.weights[last].reshape(-1), *first[1:])
        # The single-output loop runs about fifteen small NumPy calls per record, so it
        # takes bound `.dot` methods of the fixed buffers (np.dot goes through the
        # array-function dispatch first, about 0.15 us a call) and subtracts from a
        # ones vector rather than from the scalar 1.0 (a scalar operand is converted
        # on every call). Forward: the first layer (its input row changes per record),
        # then (bound dot of the layer below, layer, pre-activation) above it.
        # (Without hidden layers only the flag is read: the output reads the input row.)
        self._no_hidden = last == 0
        self._first_layer = network.layers[0]
        self._first_core = cores[0] if last > 0 else self._z
        self._upper_forward = [(acts[j - 1].dot, network.layers[j], cores[j])
                               for j in range(1, last)]
        self._last_input = acts[-1] if last > 0 else self._z
        self._ones = np.ones_like(self._hidden)
        # Backward, the hidden layers above the first (top first), then the first (fed by
        # the input row, found per record).
        self._scalar_upper = [(src, sl, de, col.dot, row, gr, down[0].dot, down[1])
                              for src, sl, de, row, col, gr, down in self._scalar_plan
                              if col is not None and down is not None]
        self._scalar_first = None if last == 0 else (
            self._scalar_plan[-1][0], self._scalar_plan[-1][1], self._scalar_plan[-1][2],
            self._scalar_plan[-1][3], self._scalar_plan[-1][5])
        self._last_layer_flat = network.layers[last].reshape(-1)  # (h + 1,) when k == 1
        self._last_grad_flat = self._grads[last].reshape(-1)
        self._binary = network.output == "logistic"
        self._squared_logistic = self._binary and loss == "squared_error"
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
        Xa = augment(X)
        columns = Xa[:, :, None]
        raw_targets = (y * target_scale + target_center) if self._identity else y
        flat_scores = scores.reshape(-1) if self.n_outputs == 1 else scores
        # Overflow is detected on scalars and raised as NonFiniteError; no warnings.
        with np.errstate(over="ignore", invalid="ignore"):
            self._run(Xa, columns, y.tolist(), raw_targets.tolist(), flat_scores, metrics,
                      target_center, target_scale)
        return n

    def _run(self, Xa: Array, columns: Array, targets: list[Any], raw_targets: list[Any],
             flat_scores: Array, metrics: Prequential | None,
             target_center: float, target_scale: float) -> None:
        if self.n_outputs == 1:
            self._run_scalar(Xa, columns, targets, raw_targets, flat_scores, metrics,
                             target_center, target_scale)
            return
        p = self._p
        update = None if metrics is None else metrics.update
        for i in range(Xa.shape[0]):
            try:
                self._vector_step(Xa[i], columns[i], targets[i])
            except NonFiniteError as exc:
                raise NonFiniteError(f"record {i}: {exc}", applied=i) from exc
            flat_scores[i] = p
            if update is not None:
                update(raw_targets[i], p)

    def _run_scalar(self, Xa: Array, columns: Array, targets: list[Any],
                    raw_targets: list[Any], flat_scores: Array, metrics: Prequential | None,
                    target_center: float, target_scale: float) -> None:
        """The single-output loop, written out in one function: per record it costs
        about fifteen small NumPy calls, so Python call overhead matters."""
        multiply, subtract, sign, copyto = np.multiply, np.subtract, np.sign, np.copyto
        exp, isfinite = math.exp, math.isfinite
        activation = self.network.activation
        activate = _ACTIVATE_INTO[activation]
        tanh, logistic = activation == "tanh", activation == "logistic"
        first_layer, first_core = self._first_layer, self._first_core
        upper_forward, last_input = self._upper_forward, self._last_input
        hidden, slopes_all, ones = self._hidden, self._slopes_all, self._ones
        upper, first = self._scalar_upper, self._scalar_first
        last_flat, last_grad = self._last_layer_flat, self._last_grad_flat
        no_hidden, last_dot = self._no_hidden, last_input.dot
        step = self.optimizer.step_
        identity, squared_logistic = self._identity, self._squared_logistic
        record = None if metrics is None else metrics.scalar_update()
        i = 0
        try:
            for i in range(Xa.shape[0]):
                x = Xa[i]
                if no_hidden:  # no hidden layer: the output reads the input row
                    z = float(x.dot(last_flat))
                    copyto(last_grad, x)  # dz/dW_last = the last layer's input
                else:
                    x.dot(first_layer, first_core)
                    activate(first_core, first_core)
                    for dot_below, layer, core in upper_forward:
                        dot_below(layer, core)
                        activate(core, core)
                    z = float(last_dot(last_flat))
                if not isfinite(z):
                    raise NonFiniteError("the network output is not finite")
                target = targets[i]
                if identity:
                    result = z
                    d = z - target  # squared error on identity: dL/dz = z - t
                else:
                    if z >= 0.0:
                        result = 1.0 / (1.0 + exp(-z))
                    else:
                        e = exp(z)
                        result = e / (1.0 + e)
                    d = result - target  # logistic + cross-entropy: dL/dz = p - t
                    if squared_logistic:
                        d *= result * (1.0 - result)  # chain through dp/dz = p (1 - p)
                # Backpropagate dz/dparams; the optimizer scales it by dL/dz = d.
                if first is not None:
                    copyto(last_grad, last_input)  # dz/dW_last = the last layer's input
                    # Every hidden layer's slope in one pass (or two), from its output.
                    if tanh:  # 1 - y^2
                        multiply(hidden, hidden, slopes_all)
                        subtract(ones, slopes_all, slopes_all)
                    elif logistic:  # y (1 - y)
                        subtract(ones, hidden, slopes_all)
                        multiply(slopes_all, hidden, slopes_all)
                    else:  # relu: y >= 0, so sign(y) is the indicator [y > 0]
                        sign(hidden, slopes_all)
                    for source, slopes, delta, column_dot, delta_row, grad, down_dot, below \
                            in upper:
                        multiply(source, slopes, delta)
                        column_dot(delta_row, grad)  # dL/dW = input x delta
                        down_dot(delta, below)  # the delta one layer down, before slopes
                    source, slopes, delta, delta_row, grad = first
                    multiply(source, slopes, delta)
                    columns[i].dot(delta_row, grad)
                step(d)
                if identity:
                    result = result * target_scale + target_center
                flat_scores[i] = result
                if record is not None:
                    record(raw_targets[i], result)
        except NonFiniteError as exc:
            raise NonFiniteError(f"record {i}: {exc}", applied=i) from exc

    def _forward_hidden(self, x: Array) -> Array:
        """Fill the hidden buffers for input x (augmented); returns the last layer's input."""
        dot, activate = np.dot, self._activate
        a = x
        for layer, core, act in self._forward_plan:
            dot(a, layer, core)
            activate(core)
            a = act
        return a

    def _backward_hidden(self, x_column: Array, plan: list[Any]) -> None:
        """Deltas of the hidden layers down to the first layer's gradient;
        dL/dW = input (column) times delta (row)."""
        self._slope(self._hidden, self._slopes_all)  # every hidden layer in one pass
        dot, multiply = np.dot, np.multiply
        for source, slopes, delta, delta_row, column, grad, below in plan:
            multiply(source, slopes, delta)
            dot(x_column if column is None else column, delta_row, grad)
            if below is not None:
                dot(below[0], delta, below[1])

    def _vector_step(self, x: Array, x_column: Array, target: int) -> float:
        """One record through a softmax network; head outputs are left in self._p."""
        a = self._forward_hidden(x)
        z, p = self._z, self._p
        np.dot(a, self.network.layers[self._last], z)
        peak = float(z.max())
        if not math.isfinite(peak):
            raise NonFiniteError("the network output is not finite")
        np.subtract(z, peak, p)  # exp never overflows
        np.exp(p, p)
        np.multiply(p, 1.0 / float(p.sum()), p)
        last = self._last
        dz = self._deltas[last]
        np.copyto(dz, p)
        dz[target] -= 1.0  # softmax + cross-entropy: dL/dz = p - onehot
        column = self._act_columns[last - 1] if last > 0 else x_column
        np.dot(column, self._delta_rows[last], self._grads[last])
        if last > 0:
            np.dot(self.network.weights[last], dz, self._deltas[last - 1])
            self._backward_hidden(x_column, self._backward_plan)
        self.optimizer.step_()
        return math.nan


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
