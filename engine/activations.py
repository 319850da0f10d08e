"""The network's element-wise functions, each defined once: the one table.

`ACTIVATIONS` holds the hidden-layer activations (tanh, logistic, relu), `HEADS`
the output heads (logistic: one unit, p(class 1); softmax: class probabilities;
identity: regression values). Every entry has its array form, which works on
NumPy arrays in place, and, where the per-record path needs it, its scalar form
on Python floats (a single-output head: one number per record, where a NumPy
call would cost more than the arithmetic).

Derivatives are written in terms of the output y = f(z) (the classic
backpropagation identities: logistic y (1 - y), tanh 1 - y^2, relu [y > 0]), so
the backward pass reuses the forward buffers instead of keeping pre-activations.

NumPy calls take `out` positionally where NumPy allows it: these run once per
layer per record, and keyword parsing costs as much as a small array operation.
For the same reason the array slopes take `ones`, an array of ones shaped like
`y`, which NumPy uses as it is, where a scalar 1.0 is converted on every call.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]


# ------------------------------------------------------------ the logistic function
def logistic_(z: Array, out: Array) -> Array:
    """Logistic of z into out (may be z), as (1 + tanh(z / 2)) / 2: never overflows,
    no branch, four in-place passes. Accurate to 1.2e-16 absolutely (not
    relatively: far below 0 it is exactly 0, where 1 / (1 + e^-z) is tiny)."""
    np.multiply(z, 0.5, out)
    np.tanh(out, out)
    np.multiply(out, 0.5, out)
    return np.add(out, 0.5, out)


def logistic(z: float) -> float:
    """Scalar form: exp is only ever taken of -|z|, so it never overflows.

    On a float a branch costs nothing; this form is the one the per-record path
    has always used, which keeps weights learnt online bit-identical across
    releases. It agrees with `logistic_` to within 2^-52 (4.4e-16): the two round
    differently, and NumPy's vectorised tanh is not the C library's.
    """
    if z >= 0.0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


def logistic_slope(y: Array, out: Array, ones: Array | float) -> Array:
    """d logistic/dz = y (1 - y)."""
    np.subtract(ones, y, out)
    return np.multiply(out, y, out)


# ------------------------------------------------------------ other hidden activations
def relu_(z: Array, out: Array) -> Array:
    """max(z, 0) into out (may be z)."""
    return np.maximum(z, 0.0, out=out)  # a positional out is deprecated for maximum


def tanh_slope(y: Array, out: Array, ones: Array | float) -> Array:
    """d tanh/dz = 1 - y^2."""
    np.multiply(y, y, out)
    return np.subtract(ones, out, out)


def relu_slope(y: Array, out: Array, ones: Array | float) -> Array:
    """d relu/dz = 1 where y > 0, else 0 (0 at the kink, as PyTorch)."""
    # y >= 0 always, so sign(y) is exactly the indicator [y > 0].
    return np.sign(y, out)


@dataclass(frozen=True)
class Activation:
    """A hidden-layer activation: `apply(z, out)` writes f(z) into out (out may be
    z); `slope(y, out, ones)` writes f'(z) from the outputs y = f(z)."""

    name: str
    apply: Callable[[Array, Array], object]
    slope: Callable[[Array, Array, Array], object]


ACTIVATIONS: dict[str, Activation] = {
    # np.tanh itself is the array form: no Python call between the layers.
    "tanh": Activation("tanh", np.tanh, tanh_slope),
    "logistic": Activation("logistic", logistic_, logistic_slope),
    "relu": Activation("relu", relu_, relu_slope),
}


# ------------------------------------------------------------ output heads
def softmax_(z: Array) -> Array:
    """Softmax of each row of z (n, k), in place; exp never overflows once the
    row's largest value is taken off."""
    z -= z.max(axis=-1, keepdims=True)
    np.exp(z, z)
    z /= z.sum(axis=-1, keepdims=True)
    return z


def _logistic_head_(z: Array) -> Array:
    return logistic_(z, z)


def _identity_(z: Array) -> Array:
    return z


def _logistic_jacobian_row(p: Array, unit: int, out: Array) -> Array:
    """d p / d z = p (1 - p) (one unit): the hidden activation's slope."""
    return logistic_slope(p, out, 1.0)


def _softmax_jacobian_row(p: Array, unit: int, out: Array) -> Array:
    """d p_u / d z_j = p_u (delta_uj - p_j)."""
    value = p[:, unit]
    np.multiply(p, -value[:, None], out)
    out[:, unit] += value
    return out


def _identity_jacobian_row(p: Array, unit: int, out: Array) -> Array:
    out[...] = 0.0
    out[:, unit] = 1.0
    return out


def _logistic_slope_scalar(p: float) -> float:
    return p * (1.0 - p)


def _identity_scalar(z: float) -> float:
    return z


def _one(p: float) -> float:
    return 1.0


@dataclass(frozen=True)
class Head:
    """An output head. Array forms work on rows of logits (n, k): `activate_(z)`
    turns them into outputs in place; `jacobian_row(p, unit, out)` writes
    d p[:, unit] / d z (n, k) from the outputs p, the start of a backward pass from
    one output. A single-output head also has scalar forms: `value(z)` and
    `slope(p)` = d p / d z from p."""

    name: str
    activate_: Callable[[Array], Array]
    jacobian_row: Callable[[Array, int, Array], Array]
    value: Callable[[float], float] | None = None
    slope: Callable[[float], float] | None = None


HEADS: dict[str, Head] = {
    "logistic": Head("logistic", _logistic_head_, _logistic_jacobian_row,
                     logistic, _logistic_slope_scalar),
    "softmax": Head("softmax", softmax_, _softmax_jacobian_row),
    "identity": Head("identity", _identity_, _identity_jacobian_row,
                     _identity_scalar, _one),
}
