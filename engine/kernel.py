"""The kernel: the one forward and the one backward pass, over a workspace.

Examples are columns. A `Workspace` for `rows` examples holds the network's
inputs as an (n_inputs + 1, rows) block whose last row is ones, and every hidden
layer's outputs as a block of rows of one buffer, each block followed by a row
of ones. A layer is its weights with the bias row below them (engine.network),
so `layer.T @ block` gives the next pre-activations, bias included, in one
product. With one example the blocks are columns and every product is a
matrix-vector product; the same code runs a batch.

`forward` fills the hidden blocks and the logits. `backward` starts from the
delta of the logits, which the caller gives: dLoss/dlogits to learn (the
parameter gradient, summed over the examples, goes into the gradient the
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
# One example backward through one output: (the top layer's input block, its gradient
# block, its weight column, the delta below, the slopes below).
UnitTop = tuple[Array, Array | None, Array, Array, Array]
# The first layer: (its delta as examples x units, its gradient block, bound dot of its
# weights, its delta as units x examples, its delta as it is: a vector for one example).
Bottom = tuple[Array, Array | None, Dot, Array, Array]
BackwardPlan = tuple[Callable[[Array, Array, Array], object], Array, Array, Array, bool,
                     tuple[BackStep, ...], UnitTop | None, tuple[BackStep, ...], Bottom]


def _plans(work: Workspace, layers: list[Array], grads: list[Array] | None,
           blocks: list[Array], cores: list[Array], deltas: list[Array],
           slopes: list[Array]) -> tuple[ForwardPlan, BackwardPlan]:
    """The steps of both passes over one copy of the weights (`layers`), packed in
    tuples that a pass unpacks at once: one attribute lookup costs about as much
    as a small NumPy call's Python overhead, and one record's pass makes a dozen.
    (Plain tuples, named by the aliases above: CPython unpacks an exact tuple in
    one specialised step, a named tuple through its iterator, about 3x slower.)"""
    last = len(layers) - 1
    outs = [*cores, work.logits]
    upper = tuple((cores[i - 1], layers[i].T.dot, blocks[i - 1], outs[i])
                  for i in range(1, last + 1))
    forward_plan = (layers[0].T.dot, outs[0], upper, work.apply, work.logits)
    g = work.grad_rows
    back = [b if g == work.rows else b[:, :g] for b in blocks]
    # A delta as examples x units, for the products with the blocks (a vector
    # delta, of one example, as a (1, units) row).
    rows_of = [d[None, :] if d.ndim == 1 else d.T for d in deltas]
    # Layers with a hidden layer below, top first.
    steps: tuple[BackStep, ...] = tuple(
        (back[i - 1].dot, rows_of[i], None if grads is None else grads[i],
         layers[i][:-1].dot, deltas[i], deltas[i - 1], slopes[i - 1])
        for i in range(last, 0, -1))
    # One example backward through one output: its delta is a float, and the delta
    # below is the weight column times it (see `backward`).
    unit_top: UnitTop | None = None
    if last > 0 and g == 1 and work.logits.shape[0] == 1:
        unit_top = (back[last - 1], None if grads is None else grads[last],
                    layers[last][:-1, 0], deltas[last - 1], slopes[last - 1])
    # (Of one example the delta is a vector, so d/dinputs comes back as one.)
    bottom: Bottom = (rows_of[0], None if grads is None else grads[0], layers[0][:-1].dot,
                      rows_of[0].T, deltas[0])
    backward_plan = (work.slope, work.hidden_back, work.slopes, work.ones, work.learning,
                     steps, unit_top, steps[1:], bottom)
    return forward_plan, backward_plan


class Workspace:
    """Buffers and views for passes of `rows` examples through one network, the
    first `grad_rows` of them backward. Serves one pass at a time.

    `grad`: a flat vector laid out like the parameters to learn into (every row
    goes backward), or None to attribute. `weight_rows`: the vectors the weights
    may live in (default: the network's parameters).

    `inputs` (n_inputs + 1, rows), last row ones: callers write their examples into
    `examples`, its first n_inputs rows (`columns`: the first two examples, a
    one-point explanation's x and baseline), or pass their own block of that shape.
    `logits` (k, rows) and `outputs`, its (rows, k) view; `delta` (k, grad_rows),
    the delta of the logits that `backward` starts from.
    """

    __slots__ = ("params", "rows", "grad_rows", "shape", "inputs", "examples", "columns",
                 "hidden", "hidden_back", "slopes", "ones", "logits", "outputs", "delta",
                 "grad", "learning", "apply", "slope", "forward_plans", "backward_plans",
                 "nbytes")

    def __init__(self, network: Network, rows: int, grad_rows: int | None = None, *,
                 grad: Array | None = None, weight_rows: Sequence[Array] | None = None
                 ) -> None:
        g = rows if grad_rows is None else grad_rows
        if not 1 <= g <= rows or (grad is not None and g != rows):
            raise ValueError(f"grad_rows must be in 1..{rows} (all of them to learn), not {g}")
        sizes = network.sizes
        hidden_sizes = sizes[1:-1]
        self.params = network.params
        self.rows, self.grad_rows, self.shape = rows, g, (rows, g)
        self.inputs = np.ones((sizes[0] + 1, rows))
        self.examples = self.inputs[:-1]
        self.columns = tuple(self.examples[:, j] for j in range(min(rows, 2)))
        self.hidden = np.ones((sum(h + 1 for h in hidden_sizes), rows))
        self.logits = np.empty((sizes[-1], rows))
        self.outputs = self.logits.T
        self.delta = np.empty((sizes[-1], g))
        # With one example backward its slopes and deltas are vectors: a ufunc or a
        # matrix-vector product costs less on a vector than on an (n, 1) array.
        vector = g == 1
        self.hidden_back = self.hidden[:, 0] if vector else \
            self.hidden if g == rows else self.hidden[:, :g]
        self.slopes = np.empty(self.hidden_back.shape)
        self.ones = np.ones_like(self.slopes)
        blocks, cores, slopes, start = [], [], [], 0
        for h in hidden_sizes:
            blocks.append(self.hidden[start : start + h + 1])
            cores.append(self.hidden[start : start + h])
            slopes.append(self.slopes[start : start + h])
            start += h + 1
        # The delta of each layer's pre-activations: hidden layers, then the logits.
        deltas = [*(np.empty(h if vector else (h, g)) for h in hidden_sizes),
                  self.delta[:, 0] if vector else self.delta]
        activation = ACTIVATIONS[network.activation]
        self.apply, self.slope = activation.apply, activation.slope
        self.grad, self.learning = grad, grad is not None
        grads = None if grad is None else network.layer_views(grad)
        storages = (network.params,) if weight_rows is None else tuple(weight_rows)
        plans = [_plans(self, network.layers if storage is network.params
                        else network.layer_views(storage), grads, blocks, cores, deltas, slopes)
                 for storage in storages]
        self.forward_plans = tuple(forward for forward, _ in plans)
        self.backward_plans = tuple(backward for _, backward in plans)
        self.nbytes = sum(a.nbytes for a in (self.inputs, self.hidden, self.logits,
                                             self.delta, self.slopes, self.ones, *deltas[:-1]))


def forward(work: Workspace, inputs: Array, live: int = 0) -> Array:
    """Run `inputs` (n_inputs + 1, rows; last row ones) through the network with the
    weights in row `live`: fills the hidden blocks; returns the logits (k, rows)."""
    dot, out, upper, apply, logits = work.forward_plans[live]
    dot(inputs, out)
    for core, dot, block, out in upper:
        apply(core, core)
        dot(block, out)
    return logits


def hidden_preactivations(work: Workspace, inputs: Array, layer: int) -> Array:
    """Pre-activations (size, rows) of hidden layer `layer` (0: the first): the
    forward pass stopped before that layer's activation."""
    dot, out, upper, apply, _ = work.forward_plans[0]
    dot(inputs, out)
    for core, dot, block, out in upper[:layer]:
        apply(core, core)
        dot(block, out)
    return out


def backward(work: Workspace, inputs: Array, live: int = 0, top: float | None = None,
             row_weights: Array | None = None) -> Array | None:
    """Backpropagate the delta of the logits after a `forward` of `inputs`: `top`
    for one example backward through a single output (a float: no array is
    written per record), else `work.delta` (k, grad_rows).

    Learning (the workspace has a gradient): writes dLoss/dparams summed over the
    first grad_rows examples into it and returns None. One record with one output
    passes top=1.0: the gradient is then dz/dparams, which the caller scales by
    dLoss/dz. Attributing: returns d/dinputs, (n_inputs, grad_rows) or for one
    example (n_inputs,), or its `row_weights`-weighted sum over the examples
    (n_inputs,), taken before the last product.
    """
    (slope, hidden, slopes_all, ones, learning, steps, unit_top, after_top,
     bottom) = work.backward_plans[live]
    multiply = np.multiply
    if steps:
        slope(hidden, slopes_all, ones)  # every hidden layer at once
        if top is not None:
            assert unit_top is not None  # one example backward, one output
            block, top_grad, column, below, slopes = unit_top
            if top == 1.0:
                multiply(column, slopes, below)
            else:
                multiply(column, top, below)
                multiply(below, slopes, below)
            if top_grad is not None:  # learning
                np.copyto(top_grad, block)
                if top != 1.0:
                    multiply(top_grad, top, top_grad)
            steps = after_top
        if learning:
            for block_dot, delta_t, grad, weights_dot, delta, below, slopes in steps:
                block_dot(delta_t, grad)  # dL/dW = input x delta, summed over examples
                weights_dot(delta, below)  # the delta one layer down, before its slopes
                multiply(below, slopes, below)
        else:
            for _, _, _, weights_dot, delta, below, slopes in steps:
                weights_dot(delta, below)
                multiply(below, slopes, below)
    elif top is not None:  # no hidden layer
        if learning and top == 1.0:
            np.copyto(bottom[1], inputs)  # type: ignore[arg-type]  # dz/dW is the input
            return None
        work.delta[0, 0] = top
    delta_t, first_grad, weights_dot, delta_columns, delta = bottom
    if learning:
        inputs.dot(delta_t, first_grad)
        return None
    if row_weights is not None:
        summed: Array = weights_dot(delta_columns.dot(row_weights))
        return summed
    gradient: Array = weights_dot(delta)
    return gradient
