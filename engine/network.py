"""A multilayer perceptron whose parameters live in one flat float64 vector.

Layer i is the block `layers[i]` of shape (sizes[i] + 1, sizes[i+1]): its first
sizes[i] rows are `weights[i]` (scikit-learn's coefs_ layout) and its last row is
`biases[i]`. All three are views into `params`, so an optimizer updates the whole
network with a few whole-vector operations, and a row `[a, 1]` times `layers[i]`
gives the next pre-activation, bias included, in one product.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine import heads
from engine.activations import ACTIVATE, DERIVATIVE
from engine.errors import InvalidInputError

Array = NDArray[np.float64]


class Network:
    """Fully connected layers; hidden `activation`, output head `output`."""

    sizes: tuple[int, ...]
    activation: str
    output: str
    params: Array
    layers: list[Array]
    weights: list[Array]
    biases: list[Array]

    def __init__(self, sizes: Sequence[int], activation: str, output: str,
                 params: Array | None = None) -> None:
        sizes = tuple(int(s) for s in sizes)
        if len(sizes) < 2 or min(sizes) < 1:
            raise InvalidInputError("a network needs at least an input and an output size",
                                    field="sizes")
        if activation not in ACTIVATE:
            raise InvalidInputError(f"unknown activation {activation!r}", field="activation")
        if output not in heads.HEADS:
            raise InvalidInputError(f"unknown output head {output!r}", field="output")
        if output == "logistic" and sizes[-1] != 1:
            raise InvalidInputError("a logistic head has one output", field="output")
        if output == "softmax" and sizes[-1] < 2:
            raise InvalidInputError("a softmax head has at least two outputs", field="output")
        self.sizes, self.activation, self.output = sizes, activation, output
        n = self.parameter_count(sizes)
        if params is None:
            self.params = np.zeros(n)
        else:
            if params.shape != (n,):
                raise InvalidInputError(f"expected {n} parameters, got shape {params.shape}",
                                        field="params")
            self.params = np.array(params, dtype=np.float64)  # own copy, contiguous
        self.layers = self._views(self.params)
        self.weights = [layer[:-1] for layer in self.layers]
        self.biases = [layer[-1] for layer in self.layers]
        # Reusable scratch of passes that keep views of the parameters (one-record
        # explanations, engine.input_gradients); each entry serves one caller at a time.
        self.workspaces: list[Any] = []

    def bind_(self, storage: Array) -> None:
        """Move the parameters into `storage` (1-D float64, right size) and rebuild the views.

        Lets an optimizer keep the parameters in a row of its own buffer; views taken
        from this network before the call no longer track it.
        """
        if storage.shape != self.params.shape or storage.dtype != np.float64 \
                or not storage.flags.c_contiguous:
            raise InvalidInputError("storage must be a contiguous float64 vector of the "
                                    "parameter count", field="params")
        storage[...] = self.params
        self.params = storage
        self.layers = self._views(storage)
        self.weights = [layer[:-1] for layer in self.layers]
        self.biases = [layer[-1] for layer in self.layers]
        self.workspaces = []  # their views are of the old storage

    @staticmethod
    def parameter_count(sizes: Sequence[int]) -> int:
        """Number of weights and biases of a network with these layer sizes."""
        return sum((a + 1) * b for a, b in zip(sizes[:-1], sizes[1:], strict=True))

    @classmethod
    def create(cls, sizes: Sequence[int], activation: str, output: str,
               rng: np.random.Generator) -> Network:
        """New network: Glorot uniform weights (He uniform for relu), zero biases.

        Glorot & Bengio (2010): U(-a, a) with a = sqrt(6 / (fan_in + fan_out)), variance
        2 / (fan_in + fan_out). He et al. (2015): a = sqrt(6 / fan_in), variance 2 / fan_in.
        The output layer is Glorot whatever the hidden activation.
        """
        net = cls(sizes, activation, output)
        last = len(net.weights) - 1
        for i, w in enumerate(net.weights):
            fan_in, fan_out = w.shape
            if activation == "relu" and i < last:
                limit = np.sqrt(6.0 / fan_in)
            else:
                limit = np.sqrt(6.0 / (fan_in + fan_out))
            w[...] = rng.uniform(-limit, limit, size=w.shape)
        return net

    def copy(self) -> Network:
        """An independent network with the same parameters."""
        return Network(self.sizes, self.activation, self.output, self.params)

    @property
    def n_inputs(self) -> int:
        return self.sizes[0]

    @property
    def n_outputs(self) -> int:
        return self.sizes[-1]

    def check_inputs(self, X: NDArray[np.float64]) -> Array:
        """X as a 2-D float64 array of the right width; InvalidInputError otherwise."""
        X = np.asarray(X, dtype=np.float64)
        if X.ndim == 1:
            X = X[None, :]
        if X.ndim != 2 or X.shape[1] != self.sizes[0]:
            raise InvalidInputError(
                f"expected inputs of shape (n, {self.sizes[0]}), got {X.shape}", field=None
            )
        # A finite sum proves every element finite (one pass); only an overflowing
        # or non-finite sum needs the elementwise look.
        if not math.isfinite(float(X.sum())) and not np.isfinite(X).all():
            raise InvalidInputError("inputs must be finite", field=None)
        return X

    def hidden_and_logits(self, X: Array) -> list[Array]:
        """Activations of every layer: [X, h1, ..., h_L, logits], each (n, size)."""
        outs = [X]
        a = X
        activate = ACTIVATE[self.activation]
        for i, (w, b) in enumerate(zip(self.weights, self.biases, strict=True)):
            z = a @ w
            z += b
            if i < len(self.weights) - 1:
                activate(z)
            outs.append(z)
            a = z
        return outs

    def logits(self, X: Array) -> Array:
        """Output pre-activations (n, n_outputs)."""
        a = self.check_inputs(X)
        activate = ACTIVATE[self.activation]
        last = len(self.weights) - 1
        for i, (w, b) in enumerate(zip(self.weights, self.biases, strict=True)):
            z = np.dot(a, w)
            z += b
            if i < last:
                activate(z)
            a = z
        return a

    def forward(self, X: Array) -> Array:
        """Head outputs (n, n_outputs): probabilities (logistic/softmax) or values."""
        return heads.activate_(self.output, self.logits(X))

    def _backward(self, outs: list[Array], d: Array, grad: Array | None,
                  scale: float) -> Array:
        """Backpropagate dL/dlogits `d` (n, k); returns dL/dX (n, n_inputs).

        With `grad` given, writes scale * sum over rows of dL/dparams into it.
        dL/dW_ij = a_i * dL/dz_j (the published rule), summed over the batch.
        """
        derivative = DERIVATIVE[self.activation]
        grad_layers = None if grad is None else self._views(grad)
        for i in range(len(self.weights) - 1, -1, -1):
            a = outs[i]
            if grad_layers is not None:
                np.matmul(a.T, d, out=grad_layers[i][:-1])
                np.sum(d, axis=0, out=grad_layers[i][-1])
            d = d @ self.weights[i].T
            if i > 0:
                d *= derivative(a, np.empty_like(a))
        if grad is not None and scale != 1.0:
            grad *= scale
        return d

    def _views(self, flat: Array) -> list[Array]:
        """Per-layer (fan_in + 1, fan_out) views of a flat vector laid out like params."""
        views, offset = [], 0
        for fan_in, fan_out in zip(self.sizes[:-1], self.sizes[1:], strict=True):
            size = (fan_in + 1) * fan_out
            views.append(flat[offset : offset + size].reshape(fan_in + 1, fan_out))
            offset += size
        return views

    def loss_gradient(self, X: Array, y: NDArray[np.generic], loss: str,
                      out: Array | None = None) -> tuple[float, Array]:
        """Mean loss over the rows and its gradient w.r.t. `params` (flat, like params).

        `y`: class indices (n,) for logistic/softmax heads, values (n,) for identity.
        """
        heads.check_head(self.output, loss)
        X = self.check_inputs(X)
        y = np.asarray(y)
        if y.shape != (X.shape[0],):
            raise InvalidInputError(f"expected {X.shape[0]} targets, got shape {y.shape}")
        outs = self.hidden_and_logits(X)
        z = outs[-1]
        p = heads.activate(self.output, z)
        grad = np.empty_like(self.params) if out is None else out
        n = X.shape[0]
        self._backward(outs, heads.delta(self.output, loss, p, y), grad, 1.0 / n)
        return float(heads.losses(self.output, loss, z, y).mean()), grad

    def input_gradient(self, X: Array, output_index: int, *, of: str = "output") -> Array:
        """d forward(X)[:, output_index] / dX (n, n_inputs), by backpropagation.

        of="logit" differentiates the pre-activation of that output instead.
        """
        if not 0 <= output_index < self.sizes[-1]:
            raise InvalidInputError(f"output index {output_index} out of range",
                                    field="output")
        X = self.check_inputs(X)
        outs = self.hidden_and_logits(X)
        z = outs[-1]
        if of == "logit":
            d = np.zeros_like(z)
            d[:, output_index] = 1.0
        elif of == "output":
            d = heads.jacobian_row(self.output, heads.activate(self.output, z), output_index)
        else:
            raise InvalidInputError(f"of must be 'output' or 'logit', not {of!r}", field="of")
        return self._backward(outs, d, None, 1.0)
