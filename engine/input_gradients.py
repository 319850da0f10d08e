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

import functools
import math

import numpy as np
from numpy.typing import NDArray

from .activations import ACTIVATE
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


@functools.lru_cache(maxsize=64)
def _column_layout(sizes: tuple[int, ...]) -> tuple[tuple[int, ...], int]:
    """First row of each layer's block in the column buffer of `gradient_at` (block j
    holds layer j's outputs, sizes[j] rows, then a row of ones), and the total rows."""
    starts, row = [], 0
    for size in sizes[:-1]:
        starts.append(row)
        row += size + 1
    return tuple(starts), row


@functools.lru_cache(maxsize=64)
def _ones(n: int) -> NDArray[np.float64]:
    """A read-only vector of n ones: `ones - y` costs less than `1.0 - y` (NumPy
    converts a scalar operand on every call)."""
    ones = np.ones(n)
    ones.flags.writeable = False
    return ones


def gradient_at(network: Network, x: NDArray[np.float64], baseline: NDArray[np.float64],
                unit: int | None) -> tuple[int, float, float, NDArray[np.float64]]:
    """The unit (None: the most probable at x), f(x), f(baseline) and d f / d x
    (n_inputs,) for that head output: the one-record case of
    `output_and_input_gradient`, trimmed for latency.

    x and baseline go forward together as the two columns of one buffer in which
    every layer's outputs are followed by a row of ones, so `layer.T @ block` gives
    the next pre-activations with the bias (no separate add), and the slopes of
    every hidden layer at x come from one pass down the buffer's first column. Only
    x goes backward; a single-unit head runs in Python floats.
    """
    layers, weights, sizes = network.layers, network.weights, network.sizes
    last = len(layers) - 1
    n_inputs = sizes[0]
    starts, rows = _column_layout(sizes)
    buffer = np.empty((rows, 2))
    buffer.fill(1.0)  # (np.ones costs several times more at this size)
    buffer[:n_inputs, 0] = x
    buffer[:n_inputs, 1] = baseline
    block = buffer[: n_inputs + 1]
    activation = network.activation
    activate = ACTIVATE[activation]
    tanh = activation == "tanh"
    # Bound `.dot` methods: np.dot first goes through the array-function dispatch.
    for i in range(1, last + 1):
        start = starts[i]
        core = buffer[start : start + sizes[i]]
        layers[i - 1].T.dot(block, core)
        if tanh:
            np.tanh(core, core)
        else:
            activate(core)
        block = buffer[start : start + sizes[i] + 1]
    if network.output == "softmax":
        p = layers[last].T.dot(block)  # (k, 2): the logits at x and at the baseline
        p -= p.max(axis=0)  # exp never overflows
        np.exp(p, p)
        p /= p.sum(axis=0)
        if unit is None:
            unit = int(p[:, 0].argmax())
        value, baseline_value = p[unit].tolist()
        slopes = p[:, 0] * -value  # d p_u / d z_j = p_u (delta_uj - p_j)
        slopes[unit] += value
        g = weights[last].dot(slopes)
    else:
        unit = 0 if unit is None else unit
        value, baseline_value = layers[last][:, unit].dot(block).tolist()
        slope = 1.0
        if network.output == "logistic":
            value = 0.5 + 0.5 * math.tanh(0.5 * value)
            baseline_value = 0.5 + 0.5 * math.tanh(0.5 * baseline_value)
            slope = value * (1.0 - value)
        g = weights[last][:, unit] * slope
    if last:
        # Slopes f'(z) at x of every hidden layer (the rows of ones give unused values).
        y = buffer[n_inputs + 1 :, 0]
        if activation == "tanh":  # 1 - y^2
            slopes_x = np.multiply(y, y)
            np.subtract(_ones(y.size), slopes_x, slopes_x)
        elif activation == "logistic":  # y (1 - y)
            slopes_x = np.subtract(_ones(y.size), y)
            slopes_x *= y
        else:  # relu: y >= 0, so sign(y) is the indicator [y > 0]
            slopes_x = np.sign(y)
        for i in range(last, 0, -1):
            start = starts[i] - n_inputs - 1
            g *= slopes_x[start : start + sizes[i]]
            g = weights[i - 1].dot(g)
    return unit, value, baseline_value, g
