"""A multilayer perceptron whose parameters live in one flat float64 vector.

Layer i is the block `layers[i]` of shape (sizes[i] + 1, sizes[i+1]): its first
sizes[i] rows are `weights[i]` (scikit-learn's coefs_ layout) and its last row is
`biases[i]`. All three are views into `params`, so an optimizer updates the whole
network with a few whole-vector operations, and a row `[a, 1]` times `layers[i]`
gives the next pre-activation, bias included, in one product.

The passes (outputs, loss gradients, input gradients) run on engine.kernel; the
network keeps a small pool of its workspaces so that a one-row call builds none.
"""

from __future__ import annotations

import contextlib
import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from engine import heads
from engine.activations import ACTIVATIONS, HEADS
from engine.errors import InvalidInputError
from engine.kernel import Workspace, backward, forward

Array = NDArray[np.float64]
# Pooled workspaces: of at most this many bytes each, this many shapes (the oldest
# goes first), this many of a shape (one per concurrent caller): at most 4 MiB a
# network, about 150 KiB for 20-32-16-1 with one-row predictions and explanations.
POOL_BYTES, POOL_SHAPES, POOL_DEPTH = 256 * 1024, 8, 2
# Rows per block when many rows go forward at once (Network._blocked_logits).
BLOCK_ROWS = 256


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
        if activation not in ACTIVATIONS:
            raise InvalidInputError(f"unknown activation {activation!r}", field="activation")
        if output not in HEADS:
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
        self._set_views()

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
        self._set_views()

    def _set_views(self) -> None:
        self.layers = self.layer_views(self.params)
        self.weights = [layer[:-1] for layer in self.layers]
        self.biases = [layer[-1] for layer in self.layers]
        # Pooled kernel workspaces by (rows, grad_rows); their views are of `params`.
        self._pool: dict[tuple[int, int], list[Workspace]] = {}

    def layer_views(self, flat: Array) -> list[Array]:
        """Per-layer (fan_in + 1, fan_out) views of a flat vector laid out like params."""
        views, offset = [], 0
        for fan_in, fan_out in zip(self.sizes[:-1], self.sizes[1:], strict=True):
            size = (fan_in + 1) * fan_out
            views.append(flat[offset : offset + size].reshape(fan_in + 1, fan_out))
            offset += size
        return views

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

    # ------------------------------------------------------------------ passes
    def workspace(self, rows: int, grad_rows: int = 0) -> Workspace:
        """A kernel workspace for attributing passes over `rows` examples (the first
        `grad_rows` of them backward; 0: all), from the pool if one is free; hand it
        back with `release`. list.pop and list.append are atomic, so concurrent
        callers (API threads) never share one."""
        grad_rows = grad_rows or rows
        try:
            work = self._pool[rows, grad_rows].pop()
            if work.params is self.params:  # (else the parameters moved meanwhile)
                return work
        except (KeyError, IndexError):
            pass
        return Workspace(self, rows, grad_rows)

    def release(self, work: Workspace) -> None:
        """Give a workspace from `workspace` back to the pool (if it is worth keeping)."""
        kept = self._pool.get(work.shape)
        if kept is None:
            if work.nbytes > POOL_BYTES:
                return
            pool = self._pool
            if len(pool) >= POOL_SHAPES:
                # The oldest shape goes (unless another thread is changing the pool).
                with contextlib.suppress(KeyError, RuntimeError, StopIteration):
                    del pool[next(iter(pool))]
            kept = pool.setdefault(work.shape, [])
        if len(kept) < POOL_DEPTH and work.params is self.params:
            kept.append(work)

    def pooled_bytes(self) -> int:
        """Bytes the workspace pool holds now (bounded: see POOL_BYTES)."""
        return sum(work.nbytes for kept in list(self._pool.values()) for work in list(kept))

    def logits(self, X: Array) -> Array:
        """Output pre-activations (n, n_outputs)."""
        X = self.check_inputs(X)
        if X.shape[0] == 0:
            return np.empty((0, self.sizes[-1]))
        block = self._block_rows()
        if X.shape[0] > block:
            return self._blocked_logits(X, block)
        work = self.workspace(X.shape[0])
        try:
            np.copyto(work.examples, X.T)
            z: Array = forward(work, work.inputs).T.copy()
        finally:
            self.release(work)
        return z

    def _block_rows(self) -> int:
        """Rows per block of a forward pass over many rows: the most whose
        forward-only workspace the pool keeps (at most BLOCK_ROWS)."""
        per_row = 8 * (self.sizes[0] + 1 + 2 * sum(self.sizes[1:]))
        return max(1, min(BLOCK_ROWS, POOL_BYTES // per_row))

    def _blocked_logits(self, X: Array, block: int) -> Array:
        """`logits` of many rows, a block at a time through one pooled
        forward-only workspace: no buffers of the whole batch's size are built
        and the blocks stay in cache (a holdout window of 10,000 rows scored in
        half the CPU time). Each output is the same dot products as in one pass."""
        n = X.shape[0]
        z = np.empty((n, self.sizes[-1]))
        work = self.workspace(block, 1)
        try:
            for start in range(0, n, block):
                part = X[start:start + block]
                rows = part.shape[0]
                # A last, shorter block runs in the same workspace: its other
                # columns hold the previous block's rows, whose outputs are ignored.
                np.copyto(work.examples[:, :rows], part.T)
                z[start:start + rows] = forward(work, work.inputs)[:, :rows].T
        finally:
            self.release(work)
        return z

    def forward(self, X: Array) -> Array:
        """Head outputs (n, n_outputs): probabilities (logistic/softmax) or values."""
        return HEADS[self.output].activate_(self.logits(X))

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
        grad = np.empty_like(self.params) if out is None else out
        work = Workspace(self, X.shape[0], grad=grad)
        np.copyto(work.examples, X.T)
        return mean_loss_gradient(work, work.inputs, y, self.output, loss), grad

    def input_gradient(self, X: Array, output_index: int, *, of: str = "output") -> Array:
        """d forward(X)[:, output_index] / dX (n, n_inputs), by backpropagation.

        of="logit" differentiates the pre-activation of that output instead.
        """
        if not 0 <= output_index < self.sizes[-1]:
            raise InvalidInputError(f"output index {output_index} out of range",
                                    field="output")
        if of not in ("output", "logit"):
            raise InvalidInputError(f"of must be 'output' or 'logit', not {of!r}", field="of")
        X = self.check_inputs(X)
        if X.shape[0] == 0:
            return np.empty((0, self.sizes[0]))
        work = self.workspace(X.shape[0])
        try:
            np.copyto(work.examples, X.T)
            forward(work, work.inputs)
            start = work.delta.T  # (n, k)
            if of == "logit":
                start[...] = 0.0
                start[:, output_index] = 1.0
            else:
                head = HEADS[self.output]
                head.jacobian_row(head.activate_(work.outputs), output_index, start)
            gradient = backward(work, work.inputs)
        finally:
            self.release(work)
        assert gradient is not None  # an attributing workspace returns it
        return gradient.reshape(self.sizes[0], -1).T


def mean_loss_gradient(work: Workspace, inputs: Array, y: NDArray[np.generic],
                       output: str, loss: str) -> float:
    """The mean loss of the examples in `inputs` (a block for `work`, targets `y`)
    and, into the workspace's gradient, its gradient: one forward and one backward
    pass. The logits are turned into head outputs in place."""
    forward(work, inputs)
    z = work.outputs  # (rows, k)
    value = float(heads.losses(output, loss, z, y).mean())
    heads.delta_(output, loss, HEADS[output].activate_(z), y, work.delta.T)
    backward(work, inputs)
    if work.rows != 1:
        assert work.grad is not None  # a learning workspace
        np.multiply(work.grad, 1.0 / work.rows, work.grad)
    return value
