"""The kernel: the one forward and the one backward pass, over a workspace.

Examples are columns. A `Workspace` for `rows` examples holds the network's
inputs as an (n_inputs + 1, rows) block whose last row is ones, and every hidden
layer's outputs as a block of rows of one buffer, each block followed by a row
of ones. A layer is its weights with the bias row below them (engine.network),
so `layer.T @ block` gives the next pre-activations, bias included, in one
product. With one example the blocks are columns and every product is a
matrix-vector product; the same code runs a batch.

`forward` fills the hidden blocks and the logits. `backward` starts from
`work.delta` (k, grad_rows), which the caller fills: dLoss/dlogits to learn
(the parameter gradient, summed over the examples, goes into the gradient the
workspace was built with), or a row of the head's Jacobian, d output /
dlogits, to attribute (the input gradient comes back). Only the first
`grad_rows` examples go backward: attribution sends x and the baseline forward
beside the points it differentiates.

A workspace is built once per network and shape, with its buffers, views and
bound `.dot` methods (np.dot first goes through the array-function dispatch,
about 0.15 us a call, and one record's pass makes about a dozen calls); the
views follow the weights as they change in place. An optimizer may move the
weights between rows of its buffer (see Optimizer.begin_run): the workspace
then keeps a set of views per row, and `live` says which row the weights are in.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from engine.activations import ACTIVATIONS

if TYPE_CHECKING:
    from engine.network import Network

Array = NDArray[np.float64]
Dot = Callable[..., Any]  # a bound ndarray.dot: dot(other, out)
# Forward, per layer above the first: (outputs below, to activate first; bound dot of
# the transposed layer; the block it reads; where its pre-activations go).
UpperStep = tuple[Array, Dot, Array, Array]
# (first layer's bound dot, its outputs, the layers above, activation, logits)
ForwardPlan = tuple[Dot, Array, tuple[UpperStep, ...], Callable[[Array, Array], object], Array]
# Backward, per layer with a hidden layer below, top first: (bound dot of the block
# feeding the layer, the layer's delta transposed, its gradient block, bound dot of its
# weights, its delta, the delta below, the slopes below).
BackStep = tuple[Dot, Array, Array | None, Dot, Array, Array, Array]
# One example, one output, learning: (the top layer's input block, its gradient block,
# its weight column, the delta below, the slopes below).
UnitTop = tuple[Array, Array, Array, Array, Array]
# The first layer: (its delta transposed, its gradient block, bound dot of its weights,
# its delta, that delta as a vector when one example goes backward).
Bottom = tuple[Array, Array | None, Dot, Array, Array]
BackwardPlan = tuple[Callable[[Array, Array, Array], object], Array, Array, Array, bool, bool,
                     tuple[BackStep, ...], UnitTop | None, tuple[BackStep, ...], Bottom]


class _Pass:
    """The steps of both passes over one copy of the weights, packed in tuples that
    a pass unpacks at once (one attribute lookup costs about as much as a small
    NumPy call's Python overhead, and a per-record pass would make a dozen)."""

    __slots__ = ("forward", "backward")

    def __init__(self, work: Workspace, layers: list[Array], grads: list[Array] | None,
                 blocks: list[Array], cores: list[Array], deltas: list[Array],
                 slopes: list[Array]) -> None:
        last = len(layers) - 1
        outs = [*cores, work.logits]
        upper = tuple((cores[i - 1], layers[i].T.dot, blocks[i - 1], outs[i])
                      for i in range(1, last + 1))
        self.forward: ForwardPlan = (layers[0].T.dot, outs[0], upper, work.apply, work.logits)
        g = work.grad_rows
        back = [b if g == work.rows else b[:, :g] for b in blocks]
        # Layers with a hidden layer below, top first.
        steps: tuple[BackStep, ...] = tuple(
            (back[i - 1].dot, deltas[i].T, None if grads is None else grads[i],
             layers[i][:-1].dot, deltas[i], deltas[i - 1], slopes[i - 1])
            for i in range(last, 0, -1))
        # One example, one output, learning: the top delta is dz/dz = 1, so the top
        # gradient is the block below it and the delta below is the weight column.
        unit_top: UnitTop | None = None
        if last > 0 and grads is not None and work.rows == 1 and work.logits.shape[0] == 1:
            unit_top = (blocks[last - 1], grads[last], layers[last][:-1], deltas[last - 1],
                        slopes[last - 1])
        # (The delta of one example as a vector: d/dinputs comes back as one.)
        bottom: Bottom = (deltas[0].T, None if grads is None else grads[0], layers[0][:-1].dot,
                  deltas[0], deltas[0][:, 0] if g == 1 else deltas[0])
        self.backward: BackwardPlan = (work.slope, work.hidden_back, work.slopes, work.ones,
                                       work.learning, g == work.rows, steps, unit_top,
                                       steps[1:], bottom)


class Workspace:
    """Buffers and views for passes of `rows` examples through one network.

    `inputs`: (n_inputs + 1, rows), last row ones; callers write their examples into
    `examples` (its first n_inputs rows; `columns` are the first two examples, the
    one-record passes' x and baseline) or pass their own block of that shape.
    `logits`: (k, rows), with `outputs` its (rows, k) view. `delta`: (k, grad_rows),
    the start of `backward`.
    `grad`: a flat vector laid out like the parameters, to learn into (None: the
    workspace attributes). `weight_rows`: the vectors the weights may live in
    (default: the network's parameters). Serves one pass at a time.
    """

    __slots__ = ("params", "rows", "grad_rows", "shape", "inputs", "examples", "columns",
                 "hidden", "hidden_back", "slopes",
                 "ones", "logits", "outputs", "delta", "grad", "learning", "apply",
                 "slope", "passes")

    def __init__(self, network: Network, rows: int, grad_rows: int | None = None, *,
                 grad: Array | None = None, weight_rows: Sequence[Array] | None = None
                 ) -> None:
        g = rows if grad_rows is None else grad_rows
        if not 1 <= g <= rows:
            raise ValueError(f"grad_rows must be in 1..{rows}, not {g}")
        sizes = network.sizes
        hidden_sizes = sizes[1:-1]
        self.params = network.params
        self.rows, self.grad_rows, self.shape = rows, g, (rows, g)
        self.inputs = np.ones((sizes[0] + 1, rows))
        self.examples = self.inputs[:-1]
        self.columns = tuple(self.examples[:, j] for j in range(min(rows, 2)))
        self.hidden = np.ones((sum(h + 1 for h in hidden_sizes), rows))
        self.hidden_back = self.hidden if g == rows else self.hidden[:, :g]
        self.slopes = np.empty((self.hidden.shape[0], g))
        self.ones = np.ones_like(self.slopes)
        self.logits = np.empty((sizes[-1], rows))
        self.outputs = self.logits.T
        self.delta = np.empty((sizes[-1], g))
        blocks, cores, slopes, start = [], [], [], 0
        for h in hidden_sizes:
            blocks.append(self.hidden[start : start + h + 1])
            cores.append(self.hidden[start : start + h])
            slopes.append(self.slopes[start : start + h])
            start += h + 1
        # The delta of each layer's pre-activations: hidden layers, then the logits.
        deltas = [*(np.empty((h, g)) for h in hidden_sizes), self.delta]
        activation = ACTIVATIONS[network.activation]
        self.apply, self.slope = activation.apply, activation.slope
        self.grad, self.learning = grad, grad is not None
        grads = None if grad is None else network.layer_views(grad)
        storages = (network.params,) if weight_rows is None else tuple(weight_rows)
        self.passes = tuple(
            _Pass(self, network.layers if storage is network.params
                  else network.layer_views(storage), grads, blocks, cores, deltas, slopes)
            for storage in storages)


def forward(work: Workspace, inputs: Array, live: int = 0) -> Array:
    """Run `inputs` (n_inputs + 1, rows; last row ones) through the network with the
    weights in row `live`: fills the hidden blocks; returns the logits (k, rows)."""
    dot, out, upper, apply, logits = work.passes[live].forward
    dot(inputs, out)
    for core, dot, block, out in upper:
        apply(core, core)
        dot(block, out)
    return logits


def hidden_preactivations(work: Workspace, inputs: Array, layer: int) -> Array:
    """Pre-activations (size, rows) of hidden layer `layer` (0: the first): the
    forward pass stopped before that layer's activation."""
    dot, out, upper, apply, _ = work.passes[0].forward
    dot(inputs, out)
    for core, dot, block, out in upper[:layer]:
        apply(core, core)
        dot(block, out)
    return out


def backward(work: Workspace, inputs: Array, live: int = 0, unit: bool = False,
             row_weights: Array | None = None) -> Array | None:
    """Backpropagate `work.delta` (k, grad_rows) after a `forward` of `inputs`.

    Learning (the workspace has a gradient): writes dLoss/dparams summed over the
    first grad_rows examples into it and returns None. `unit` instead takes the
    delta to be 1 (one example, one output): the gradient is then dz/dparams, which
    the caller scales by dLoss/dz. Attributing: returns d/dinputs, (n_inputs,
    grad_rows) or for one example (n_inputs,), or its `row_weights`-weighted sum
    over the examples (n_inputs,), taken before the last product.
    """
    (slope, hidden, slopes_all, ones, learning, all_rows, steps, unit_top, after_top,
     bottom) = work.passes[live].backward
    multiply = np.multiply
    if steps:
        slope(hidden, slopes_all, ones)  # every hidden layer at once
        if unit:
            assert unit_top is not None  # a one-example, one-output learning workspace
            block, top_grad, column, below, slopes = unit_top
            np.copyto(top_grad, block)
            multiply(column, slopes, below)
            steps = after_top
        for block_dot, delta_t, grad, weights_dot, delta, below, slopes in steps:
            if learning:
                block_dot(delta_t, grad)  # dL/dW = input x delta, summed over examples
            weights_dot(delta, below)  # the delta one layer down, before its slopes
            multiply(below, slopes, below)
    elif unit:  # no hidden layer: dz/dW is the input itself
        np.copyto(bottom[1], inputs)  # type: ignore[arg-type]  # (learning: a gradient)
        return None
    delta_t, first_grad, weights_dot, delta, delta_vector = bottom
    if learning:
        (inputs if all_rows else inputs[:, : work.grad_rows]).dot(delta_t, first_grad)
        return None
    if row_weights is not None:
        summed: Array = weights_dot(delta.dot(row_weights))
        return summed
    gradient: Array = weights_dot(delta_vector)
    return gradient
