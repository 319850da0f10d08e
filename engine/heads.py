"""Output heads and their losses, batched.

Heads: `logistic` (binary: one unit, p(class 1)), `softmax` (multiclass), `identity`
(regression). Losses: `cross_entropy` (logistic or softmax) and `squared_error`
(identity, or logistic as an option), each the mean over examples of the
per-example loss; squared error is 0.5 (y - t)^2 so its delta is (y - t).
Class targets are indices (n,) int64; regression targets values (n,) float64.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from engine.errors import InvalidInputError

Array = NDArray[np.float64]
HEADS = ("logistic", "softmax", "identity")
LOSS_OF_HEAD = {
    "logistic": ("cross_entropy", "squared_error"),
    "softmax": ("cross_entropy",),
    "identity": ("squared_error",),
}


def check_head(output: str, loss: str) -> None:
    """Raise InvalidInputError unless `loss` is defined on head `output`."""
    if output not in HEADS:
        raise InvalidInputError(f"unknown output head {output!r}", field="output")
    if loss not in LOSS_OF_HEAD[output]:
        raise InvalidInputError(f"loss {loss!r} is not defined on a {output} output",
                                field="loss")


def sigmoid(z: Array) -> Array:
    """Logistic function, stable for any z: exp is only taken of -|z|."""
    e = np.exp(-np.abs(z))
    return np.where(z >= 0.0, 1.0 / (1.0 + e), e / (1.0 + e))


def activate_(output: str, z: Array) -> Array:
    """Head outputs (n, k) from logits (n, k), computed in place over z (mutates z)."""
    if output == "logistic":
        # (1 + tanh(z / 2)) / 2 is the logistic function: no overflow, four passes.
        np.multiply(z, 0.5, out=z)
        np.tanh(z, out=z)
        np.multiply(z, 0.5, out=z)
        return np.add(z, 0.5, out=z)
    if output == "softmax":
        z -= z.max(axis=1, keepdims=True)  # exp never overflows
        np.exp(z, out=z)
        z /= z.sum(axis=1, keepdims=True)
    return z


def activate(output: str, z: Array) -> Array:
    """Head outputs (n, k) from logits (n, k): probabilities or values."""
    if output == "logistic":
        return sigmoid(z)
    if output == "softmax":
        shifted = z - z.max(axis=1, keepdims=True)  # exp never overflows
        e: Array = np.exp(shifted)
        e /= e.sum(axis=1, keepdims=True)
        return e
    return z.copy()


def losses(output: str, loss: str, z: Array, y: NDArray[np.generic]) -> Array:
    """Per-example loss (n,) from logits `z` (n, k) and targets `y` (n,)."""
    if output == "logistic" and loss == "cross_entropy":
        t = y.astype(np.float64)
        zc = z[:, 0]
        # -[t log p + (1-t) log(1-p)] = softplus(z) - t z, stable through log1p(exp(-|z|)).
        return np.maximum(zc, 0.0) - t * zc + np.log1p(np.exp(-np.abs(zc)))
    if output == "logistic":
        diff = sigmoid(z[:, 0]) - y.astype(np.float64)
        return 0.5 * diff * diff
    if output == "softmax":
        peak = z.max(axis=1)
        log_norm: Array = peak + np.log(np.exp(z - peak[:, None]).sum(axis=1))
        return log_norm - z[np.arange(z.shape[0]), y.astype(np.intp)]
    diff = z[:, 0] - y.astype(np.float64)
    return 0.5 * diff * diff


def delta(output: str, loss: str, p: Array, y: NDArray[np.generic]) -> Array:
    """dLoss/dz per example (n, k) from head outputs `p` (n, k) and targets `y` (n,)."""
    if output == "softmax":
        # softmax + cross-entropy: dL/dz = p - onehot(y).
        d = p.copy()
        d[np.arange(p.shape[0]), y.astype(np.intp)] -= 1.0
        return d
    d = p - y.astype(np.float64)[:, None]  # logistic + CE and identity + SE: p - t
    if output == "logistic" and loss == "squared_error":
        d *= p * (1.0 - p)  # chain through dp/dz = p (1 - p)
    return d


def jacobian_row(output: str, p: Array, index: int) -> Array:
    """d p[:, index] / dz (n, k): the start of a backward pass from one output."""
    if output == "softmax":
        # dp_i/dz_j = p_i (delta_ij - p_j)
        d = -p[:, index : index + 1] * p
        d[:, index] += p[:, index]
        return d
    if output == "logistic":
        return p * (1.0 - p)
    return np.ones_like(p)
