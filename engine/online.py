"""Online training: one record, one backpropagation step, scored before it is learnt.

The per-record path works in buffers allocated once: the hidden activations
of all layers side by side (each followed by a constant 1 that multiplies the
bias row), their derivatives, the deltas, and the gradient, which is a row of
the optimizer's buffer. Every NumPy call writes through `out=`; single-output
heads run in Python floats. Nothing grows with the number of records.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine import heads
from engine.activations import DERIVATIVE
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


class OnlineTrainer:
    """Applies records one at a time to `network` with `optimizer` (binds them together)."""

    def __init__(self, network: Network, optimizer: Optimizer, loss: str) -> None:
        heads.check_head(network.output, loss)
        network.bind_(optimizer.params)
        self.network, self.optimizer, self.loss = network, optimizer, loss
        sizes = network.sizes
        hidden = sizes[1:-1]
        k = sizes[-1]
        self.n_outputs = k
        # Hidden activations, each followed by a 1 (never overwritten).
        self._hidden = np.ones(sum(h + 1 for h in hidden))
        self._derivative = np.empty_like(self._hidden)
        acts: list[Array] = []
        cores: list[Array] = []
        slopes: list[Array] = []
        offset = 0
        for h in hidden:
            acts.append(self._hidden[offset : offset + h + 1])
            cores.append(self._hidden[offset : offset + h])
            slopes.append(self._derivative[offset : offset + h])
            offset += h + 1
        self._acts, self._cores, self._slopes = acts, cores, slopes
        self._act_columns = [a[:, None] for a in acts]
        self._deltas = [np.empty(h) for h in hidden] + [np.empty(k)]
        self._delta_rows = [d[None, :] for d in self._deltas]
        self._grads = network._views(optimizer.grad)
        self._z = np.empty(k)
        self._p = np.empty(k)  # head outputs of the current record
        self._exp = np.empty(k)
        self._activate = _ACTIVATE_INPLACE[network.activation]
        self._derive = DERIVATIVE[network.activation]
        last = len(network.layers) - 1
        self._last = last
        # Single-output heads: the last layer's gradient and back-propagated delta are
        # a vector times a Python float (cheaper than an outer product).
        self._last_grad_flat = self._grads[last].reshape(-1)
        self._last_weights_flat = network.weights[last].reshape(-1)  # used when k == 1
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
        scalar_head = self.n_outputs == 1
        raw_targets = (y * target_scale + target_center) if self._identity else y
        y_list = y.tolist()
        raw_list = raw_targets.tolist()
        flat_scores = scores.reshape(-1) if scalar_head else scores
        # Overflow is detected on scalars and raised as NonFiniteError; no warnings.
        with np.errstate(over="ignore", invalid="ignore"):
            self._run(Xa, columns, y_list, raw_list, flat_scores, metrics,
                      target_center, target_scale)
        return n

    def _run(self, Xa: Array, columns: Array, y_list: list[Any], raw_list: list[Any],
             flat_scores: Array, metrics: Prequential | None,
             target_center: float, target_scale: float) -> None:
        scalar_head = self.n_outputs == 1
        p_buf = self._p
        for i in range(Xa.shape[0]):
            try:
                value = self._step(Xa[i], columns[i], y_list[i])
            except NonFiniteError as exc:
                raise NonFiniteError(f"record {i}: {exc}", applied=i) from exc
            if scalar_head:
                if self._identity:
                    value = value * target_scale + target_center
                    p_buf[0] = value
                flat_scores[i] = value
            else:
                flat_scores[i] = p_buf
            if metrics is not None:
                metrics.update(raw_list[i], p_buf)

    def _step(self, x: Array, x_column: Array, target: Any) -> float:
        """Forward, score, backward and one optimizer step for one record.

        Returns the single head output (p or value) or nan for a softmax head
        (whose outputs are left in self._p). Raises NonFiniteError before any change.
        """
        net = self.network
        layers = net.layers
        a = x
        for layer, core, act in zip(layers, self._cores, self._acts, strict=False):
            np.dot(a, layer, out=core)
            self._activate(core)
            a = act
        z = self._z
        np.dot(a, layers[self._last], out=z)
        deltas = self._deltas
        last = self._last
        result = math.nan
        if self.n_outputs == 1:
            z0 = float(z[0])
            if not math.isfinite(z0):
                raise NonFiniteError("the network output is not finite")
            if self._identity:
                result = z0
                d = z0 - target
            else:
                if z0 >= 0.0:
                    result = 1.0 / (1.0 + math.exp(-z0))
                else:
                    e = math.exp(z0)
                    result = e / (1.0 + e)
                d = result - target  # logistic + cross-entropy: dL/dz = p - t
                if self._squared_logistic:
                    d *= result * (1.0 - result)
                self._p[0] = result
            np.multiply(a, d, out=self._last_grad_flat)
            if last > 0:
                np.multiply(self._last_weights_flat, d, out=deltas[last - 1])
        else:
            peak = float(z.max())
            if not math.isfinite(peak):
                raise NonFiniteError("the network output is not finite")
            ex = self._exp
            np.subtract(z, peak, out=ex)  # exp never overflows
            np.exp(ex, out=ex)
            np.multiply(ex, 1.0 / float(ex.sum()), out=self._p)
            dz = deltas[last]
            np.copyto(dz, self._p)
            dz[target] -= 1.0  # softmax + cross-entropy: dL/dz = p - onehot
            grads = self._grads
            np.dot(self._act_columns[last - 1] if last > 0 else x_column,
                   self._delta_rows[last], out=grads[last])
            if last > 0:
                np.dot(net.weights[last], dz, out=deltas[last - 1])
        if last > 0:
            self._backward_hidden(x_column)
        self.optimizer.step_()
        return result

    def _backward_hidden(self, x_column: Array) -> None:
        """From the delta of the last hidden layer down to the first layer's gradient."""
        self._derive(self._hidden, self._derivative)  # all hidden layers in one pass
        deltas, slopes, grads = self._deltas, self._slopes, self._grads
        weights = self.network.weights
        for i in range(self._last - 1, -1, -1):
            d = deltas[i]
            np.multiply(d, slopes[i], out=d)
            np.dot(self._act_columns[i - 1] if i > 0 else x_column, self._delta_rows[i],
                   out=grads[i])
            if i > 0:
                np.dot(weights[i], d, out=deltas[i - 1])


def _tanh_(z: Array) -> None:
    np.tanh(z, out=z)


def _relu_(z: Array) -> None:
    np.maximum(z, 0.0, out=z)


def _logistic_(z: Array) -> None:
    # (1 + tanh(z / 2)) / 2: no overflow for any z.
    np.multiply(z, 0.5, out=z)
    np.tanh(z, out=z)
    np.multiply(z, 0.5, out=z)
    np.add(z, 0.5, out=z)


_ACTIVATE_INPLACE = {"tanh": _tanh_, "relu": _relu_, "logistic": _logistic_}


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
