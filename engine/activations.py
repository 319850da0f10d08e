"""Hidden-layer activations, each with its derivative written in terms of its output.

Writing f'(z) as a function of y = f(z) (the classic backpropagation identities:
logistic y(1 - y), tanh 1 - y^2, relu [y > 0]) lets the backward pass reuse the
forward buffers instead of keeping pre-activations.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]


# `out` goes positionally where NumPy allows it: these run once per layer per
# record, and keyword parsing costs as much as a small array operation. For the
# same reason the derivatives take `one`: a caller on a per-record path passes an
# array of ones shaped like `y`, which NumPy uses as it is, where the scalar 1.0
# is converted to an array on every call (same values either way).


def tanh_(z: Array) -> Array:
    """tanh in place."""
    return np.tanh(z, z)


def logistic_(z: Array) -> Array:
    """Logistic in place, as (1 + tanh(z/2)) / 2: never overflows, no branch."""
    np.multiply(z, 0.5, z)
    np.tanh(z, z)
    np.multiply(z, 0.5, z)
    return np.add(z, 0.5, z)


def relu_(z: Array) -> Array:
    """max(z, 0) in place."""
    return np.maximum(z, 0.0, out=z)  # a positional out is deprecated for maximum


def tanh_derivative(y: Array, out: Array, one: Array | float = 1.0) -> Array:
    """d tanh/dz = 1 - y^2."""
    np.multiply(y, y, out)
    return np.subtract(one, out, out)


def logistic_derivative(y: Array, out: Array, one: Array | float = 1.0) -> Array:
    """d logistic/dz = y (1 - y)."""
    np.subtract(one, y, out)
    return np.multiply(out, y, out)


def relu_derivative(y: Array, out: Array, one: Array | float = 1.0) -> Array:
    """d relu/dz = 1 where y > 0, else 0 (0 at the kink, as PyTorch)."""
    # y >= 0 always, so sign(y) is exactly the indicator [y > 0].
    return np.sign(y, out)


ACTIVATE: dict[str, Callable[[Array], Array]] = {
    "tanh": tanh_,
    "logistic": logistic_,
    "relu": relu_,
}
DERIVATIVE: dict[str, Callable[..., Array]] = {
    "tanh": tanh_derivative,
    "logistic": logistic_derivative,
    "relu": relu_derivative,
}
