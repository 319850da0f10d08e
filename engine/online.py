"""Online training: one record, one backpropagation step, scored before it is learnt.

The per-record path works in buffers allocated once: the hidden activations
of all layers side by side (each followed by a constant 1 that multiplies the
bias row), their derivatives, the deltas, and the gradient, which is a row of
the optimizer's buffer. Every NumPy call writes into its `out` argument (given
positionally: keyword parsing costs as much as a small array operation), and
single-output heads run in Python floats. Nothing grows with the records.

A single-output network backpropagates d z / d params (z the output unit's
pre-activation) and lets the optimizer multiply by the scalar dLoss/dz: that
folds the loss into one coefficient instead of one pass per layer. With SGD the
weights move between two rows of the optimizer's buffer at every step (one
matrix product gives the new velocity and weights, see SGD.step_swapping_), so
the loop keeps a set of views per row and is back in the network's own row when
a call returns.
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
# OnlineTrainer._scalar_plan_for: (first layer, forward above it, last layer flat,
# backward above the first layer, the first layer's backward).
ScalarPlan = tuple[Array, list[tuple[Any, Array, Array]], Array, list[tuple[Any, ...]],
                   tuple[Array, Array, Array, Array, Array] | None]


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
        # The single-output loop runs about fifteen small NumPy calls per record, so it
        # takes bound `.dot` methods of the fixed buffers (np.dot goes through the
        # array-function dispatch first, about 0.15 us a call) and gives the slopes a
        # ones vector rather than the scalar 1.0 (a scalar operand is converted on
        # every call). (Without hidden layers only the flag is read: the output
        # reads the input row.)
        self._no_hidden = last == 0
        self._first_core = cores[0] if last > 0 else self._z
        self._last_input = acts[-1] if last > 0 else self._z
        self._ones = np.ones_like(self._hidden)
        self._acts, self._cores, self._slopes = acts, cores, slopes
        # A plan per row the weights can live in: SGD swaps them between two rows of
        # its buffer at every step (see SGD.step_swapping_), others keep them in one.
        weight_rows = optimizer.weight_rows if optimizer.swaps_params else (optimizer.params,)
        self._scalar_plans = tuple(
            self._scalar_plan_for(network.layers if row is optimizer.params
                                  else network._views(row)) for row in weight_rows)
        self._last_grad_flat = self._grads[last].reshape(-1)
        self._binary = network.output == "logistic"
        self._squared_logistic = self._binary and loss == "squared_error"
        self._identity = network.output == "identity"

    def _scalar_plan_for(self, layers: list[Array]) -> ScalarPlan:
        """The single-output loop's views of one copy of the weights: forward, the first
        layer (its input row changes per record), (bound dot of the layer below, layer,
        pre-activation) above it, and the last layer flat; backward, per hidden layer
        above the first, top first, (source, slopes, delta, bound dot of the column
        feeding the layer, delta row, gradient block, bound dot of the weights, delta
        one layer down), then the first's (source, slopes, delta, delta row, gradient
        block). The delta is source * slopes: the output weight column at the top layer
        (dz/d(last hidden) with one output), elsewhere the weights times the delta
        above, already in the delta buffer."""
        last = self._last
        acts, cores, slopes, deltas = self._acts, self._cores, self._slopes, self._deltas
        upper_forward = [(acts[j - 1].dot, layers[j], cores[j]) for j in range(1, last)]
        upper: list[tuple[Any, ...]] = []
        first: tuple[Array, Array, Array, Array, Array] | None = None
        for i in range(last - 1, -1, -1):
            source = layers[last][:-1].reshape(-1) if i == last - 1 else deltas[i]
            if i > 0:
                upper.append((source, slopes[i], deltas[i], self._act_columns[i - 1].dot,
                              self._delta_rows[i], self._grads[i], layers[i][:-1].dot,
                              deltas[i - 1]))
            else:
                first = (source, slopes[0], deltas[0], self._delta_rows[0], self._grads[0])
        return layers[0], upper_forward, layers[last].reshape(-1), upper, first

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
        optimizer = self.optimizer
        if not optimizer.swaps_params:
            self._scalar_loop(Xa, columns, targets, raw_targets, flat_scores, metrics,
                              target_center, target_scale, optimizer.step_, None)
            return
        live = optimizer.begin_swapping()
        try:
            self._scalar_loop(Xa, columns, targets, raw_targets, flat_scores, metrics,
                              target_center, target_scale, optimizer.step_swapping_, live)
        finally:
            optimizer.end_swapping()

    def _scalar_loop(self, Xa: Array, columns: Array, targets: list[Any],
                     raw_targets: list[Any], flat_scores: Array, metrics: Prequential | None,
                     target_center: float, target_scale: float,
                     step: Callable[[float], Any], live: int | None) -> None:
        """`live`: None for a plain step_, else the row the weights are in (the
        index in optimizer.weight_rows), which step_swapping_ moves at every step."""
        multiply, copyto = np.multiply, np.copyto
        exp, isfinite = math.exp, math.isfinite
        activation = self.network.activation
        activate, slope = _ACTIVATE_INTO[activation], self._slope
        first_core, last_input = self._first_core, self._last_input
        hidden, slopes_all, ones = self._hidden, self._slopes_all, self._ones
        last_grad = self._last_grad_flat
        no_hidden, last_dot = self._no_hidden, last_input.dot
        plans = self._scalar_plans
        swapping = live is not None
        row = 0 if live is None else live
        identity, squared_logistic = self._identity, self._squared_logistic
        record = None if metrics is None else metrics.scalar_update()
        i = 0
        try:
            for i in range(Xa.shape[0]):
                first_layer, upper_forward, last_flat, upper, first = plans[row]
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
                    slope(hidden, slopes_all, ones)  # every hidden layer in one pass
                    for source, slopes, delta, column_dot, delta_row, grad, down_dot, below \
                            in upper:
                        multiply(source, slopes, delta)
                        column_dot(delta_row, grad)  # dL/dW = input x delta
                        down_dot(delta, below)  # the delta one layer down, before slopes
                    source, slopes, delta, delta_row, grad = first
                    multiply(source, slopes, delta)
                    columns[i].dot(delta_row, grad)
                if swapping:
                    row = step(d)
                else:
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
        self._slope(self._hidden, self._slopes_all, self._ones)  # every hidden layer at once
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
