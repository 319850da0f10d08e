"""One forward and one backward pass from a chosen head output down to the inputs.

Attribution needs, in a single pass, the explained output at several rows and
its gradient with respect to the inputs: the backward pass of
Network.input_gradient (tests hold the two equal) started from one output
rather than from the loss. Kept apart from Network because the explanation
path is latency-bound: values and gradients come from one pass, a weighted sum
over rows is taken before the last product, and the one-record case keeps a
single-unit head in Python floats.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray

from .activations import ACTIVATE, DERIVATIVE
from .network import Network


def _times_slope_(g: NDArray[np.float64], y: NDArray[np.float64], activation: str) -> None:
    """g *= f'(z) from the hidden outputs y = f(z), overwriting y (the backward pass
    is past it): two or three in-place calls where a fresh buffer would cost more."""
    if activation == "tanh":  # 1 - y^2
        np.multiply(y, y, out=y)
        np.subtract(1.0, y, out=y)
    elif activation == "logistic":  # y (1 - y), one factor at a time
        g *= y
        np.subtract(1.0, y, out=y)
    else:  # relu: [y > 0], and y >= 0, so sign(y) is that indicator
        np.sign(y, out=y)
    g *= y


def _softmax_(z: NDArray[np.float64]) -> NDArray[np.float64]:
    """Row-wise softmax in place; exp never overflows after the max is taken off."""
    z -= z.max(axis=1, keepdims=True)
    np.exp(z, out=z)
    z /= z.sum(axis=1, keepdims=True)
    return z


def _head_slopes(output: str, z: NDArray[np.float64], unit: int | None, m: int,
                 choose_row: int) -> tuple[int, NDArray[np.float64], NDArray[np.float64]]:
    """The head unit explained (None: the most probable at row `choose_row`), its
    output at every row (n,), and d output / d logits (m, k) at the first m rows."""
    if output == "softmax":
        p = _softmax_(z)
        if unit is None:
            unit = int(p[choose_row].argmax())
        value = p[:, unit]
        # d p_u / d z_j = p_u (delta_uj - p_j)
        slopes = p[:m] * -value[:m, None]
        slopes[:, unit] += value[:m]
        return unit, value, slopes
    unit = 0 if unit is None else unit
    slopes = np.zeros((m, z.shape[1]))
    if output == "identity":
        slopes[:, unit] = 1.0
        return unit, z[:, unit], slopes
    # Logistic as (1 + tanh(z / 2)) / 2: no overflow; d p / d z = p (1 - p).
    p = z[:, unit] * 0.5
    np.tanh(p, out=p)
    p *= 0.5
    p += 0.5
    slopes[:, unit] = p[:m] * (1.0 - p[:m])
    return unit, p, slopes


def output_and_input_gradient(
    network: Network, X: NDArray[np.float64], unit: int | None, m: int,
    row_weights: NDArray[np.float64] | None = None, choose_row: int = -1,
) -> tuple[int, NDArray[np.float64], NDArray[np.float64]]:
    """Head output `unit` at every row of X (n,) and, by one backward pass from
    that output down to the inputs, its gradient at the first m rows (m, n_inputs),
    or their `row_weights`-weighted sum (n_inputs,) when weights (m,) are given.
    Returns the unit too: None picks the most probable unit at row `choose_row`.

    The same backpropagation as Network.input_gradient (a test holds them equal),
    kept here because one pass must give both the values and the gradients, and
    because the weighted sum can be taken before the last product.
    """
    activation = network.activation
    activate, tanh = ACTIVATE[activation], activation == "tanh"
    weights, biases = network.weights, network.biases
    last = len(weights) - 1
    hidden: list[NDArray[np.float64]] = []
    a = X
    # `.dot` methods: np.dot first goes through the array-function dispatch.
    for i in range(last):
        a = a.dot(weights[i])
        a += biases[i]
        if tanh:
            np.tanh(a, a)  # (tanh_ itself, without its Python call)
        else:
            activate(a)
        hidden.append(a)
    z = a.dot(weights[last])
    z += biases[last]
    unit, value, slopes = _head_slopes(network.output, z, unit, m, choose_row)
    g = slopes.dot(weights[last].T)
    for i in range(last, 0, -1):
        h = hidden[i - 1][:m]
        _times_slope_(g, h, activation)
        if i == 1 and row_weights is not None:
            g = row_weights.dot(g)  # sum the rows before, not after, the last product
        g = g.dot(weights[i - 1].T)
    if last == 0 and row_weights is not None:
        g = row_weights.dot(g)
    return unit, value, g


class _ColumnPass:
    """Buffers and views for `gradient_at` on one network, kept between calls.

    x and baseline go forward as the two columns of one buffer in which every
    layer's outputs are followed by a row of ones, so `layer.T @ block` gives the
    next pre-activations with the bias, and the slopes of every hidden layer at x
    come from one pass down the buffer's first column. The views follow the
    weights as they change; a workspace serves one call at a time (see
    `gradient_at`) and is rebuilt if the network's parameters move to new storage.
    """

    __slots__ = ("params", "x", "baseline", "forward", "last_block", "last_t_dot",
                 "last_column_dot", "hidden_x", "slopes", "ones", "head_weights",
                 "top", "backward")

    def __init__(self, network: Network) -> None:
        layers, weights, sizes = network.layers, network.weights, network.sizes
        last = len(layers) - 1
        n = sizes[0]
        starts, row = [], 0
        for size in sizes[:-1]:
            starts.append(row)
            row += size + 1
        buffer = np.ones((row, 2))
        self.params = network.params
        self.x, self.baseline = buffer[:n, 0], buffer[:n, 1]
        # Per layer: (bound dot of the transposed layer, block it reads, rows it fills).
        self.forward = [(layers[i - 1].T.dot, buffer[starts[i - 1] : starts[i]],
                         buffer[starts[i] : starts[i] + sizes[i]]) for i in range(1, last + 1)]
        self.last_block = buffer[starts[last] :]
        self.last_t_dot = layers[last].T.dot
        self.last_column_dot = layers[last][:, 0].dot  # single-unit heads
        self.hidden_x = buffer[n + 1 :, 0]
        self.slopes = np.empty(self.hidden_x.size)
        self.ones = np.ones(self.hidden_x.size)
        self.head_weights = weights[last]
        self.top = np.empty(sizes[last])  # d output / d (last hidden outputs)
        # Per hidden layer, top first: (its slopes at x, bound dot of the weights
        # below, where the gradient one layer down goes; None: a new array, returned).
        self.backward = []
        for i in range(last, 0, -1):
            offset = starts[i] - n - 1
            self.backward.append((self.slopes[offset : offset + sizes[i]], weights[i - 1].dot,
                                  np.empty(sizes[i - 1]) if i > 1 else None))


def gradient_at(network: Network, x: NDArray[np.float64], baseline: NDArray[np.float64],
                unit: int | None) -> tuple[int, float, float, NDArray[np.float64]]:
    """The unit (None: the most probable at x), f(x), f(baseline) and d f / d x
    (n_inputs,) for that head output: the one-record case of
    `output_and_input_gradient`, trimmed for latency (see `_ColumnPass`: both rows go
    forward together, only x comes back; a single-unit head in Python floats).

    The network keeps a pool of workspaces: a caller pops one (or builds one when
    the pool is empty) and puts it back when done. list.pop and list.append are
    atomic, so concurrent callers (API threads) never share one.
    """
    pool = network.workspaces
    try:
        work: _ColumnPass = pool.pop()
        if work.params is not network.params:
            work = _ColumnPass(network)
    except IndexError:
        work = _ColumnPass(network)
    work.x[...] = x
    work.baseline[...] = baseline
    activation = network.activation
    if activation == "tanh":
        for dot, block, core in work.forward:
            dot(block, core)
            np.tanh(core, core)
    else:
        activate = ACTIVATE[activation]
        for dot, block, core in work.forward:
            dot(block, core)
            activate(core)
    head_weights = work.head_weights
    hidden = bool(work.backward)
    if network.output == "softmax":
        p = work.last_t_dot(work.last_block)  # (k, 2): the logits at x and at the baseline
        p -= p.max(axis=0)  # exp never overflows
        np.exp(p, p)
        p /= p.sum(axis=0)
        if unit is None:
            unit = int(p[:, 0].argmax())
        value, baseline_value = p[unit].tolist()
        head = p[:, 0] * -value  # d p_u / d z_j = p_u (delta_uj - p_j)
        head[unit] += value
        g = head_weights.dot(head, work.top) if hidden else head_weights.dot(head)
    else:
        unit = 0 if unit is None else unit
        value, baseline_value = work.last_column_dot(work.last_block).tolist()
        slope = 1.0
        if network.output == "logistic":
            value = 0.5 + 0.5 * math.tanh(0.5 * value)
            baseline_value = 0.5 + 0.5 * math.tanh(0.5 * baseline_value)
            slope = value * (1.0 - value)
        column = head_weights[:, unit]
        g = np.multiply(column, slope, work.top) if hidden else column * slope
    if hidden:
        # Slopes f'(z) at x of every hidden layer (the rows of ones give unused values).
        DERIVATIVE[activation](work.hidden_x, work.slopes, work.ones)
        for layer_slopes, dot, below in work.backward:
            g *= layer_slopes
            g = dot(g) if below is None else dot(g, below)
    pool.append(work)
    return unit, value, baseline_value, g
