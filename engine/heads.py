"""The losses defined on each output head, and their deltas dLoss/dlogits.

Losses: `cross_entropy` (logistic or softmax head) and `squared_error` (identity,
or logistic as an option), each the mean over examples of the per-example loss;
squared error is 0.5 (y - t)^2 so its delta is (y - t). Class targets are
indices (n,) int64; regression targets values (n,) float64. The heads
themselves (their outputs and slopes) are in engine.activations.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine.activations import HEADS, logistic_
from engine.errors import InvalidInputError

Array = NDArray[np.float64]
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


def losses(output: str, loss: str, z: Array, y: NDArray[np.generic]) -> Array:
    """Per-example loss (n,) from logits `z` (n, k) and targets `y` (n,)."""
    if output == "logistic" and loss == "cross_entropy":
        t = y.astype(np.float64)
        zc = z[:, 0]
        # -[t log p + (1-t) log(1-p)] = softplus(z) - t z, stable through log1p(exp(-|z|)).
        return np.maximum(zc, 0.0) - t * zc + np.log1p(np.exp(-np.abs(zc)))
    if output == "logistic":
        p = logistic_(z[:, 0], np.empty(z.shape[0]))
        diff = p - y.astype(np.float64)
        return 0.5 * diff * diff
    if output == "softmax":
        peak = z.max(axis=1)
        log_norm: Array = peak + np.log(np.exp(z - peak[:, None]).sum(axis=1))
        return log_norm - z[np.arange(z.shape[0]), y.astype(np.intp)]
    diff = z[:, 0] - y.astype(np.float64)
    return 0.5 * diff * diff


def delta_(output: str, loss: str, p: Array, y: NDArray[np.generic], out: Array) -> Array:
    """dLoss/dz per example into out (n, k), from head outputs `p` (n, k) and targets
    `y` (n,)."""
    if output == "softmax":
        # softmax + cross-entropy: dL/dz = p - onehot(y).
        np.copyto(out, p)
        out[np.arange(p.shape[0]), y.astype(np.intp)] -= 1.0
        return out
    np.subtract(p, y.astype(np.float64)[:, None], out)  # logistic + CE, identity + SE: p - t
    if output == "logistic" and loss == "squared_error":
        out *= p * (1.0 - p)  # chain through dp/dz = p (1 - p)
    return out


# Scalar forms for a single-output head: dLoss/dz from the output p and the target t.
def _output_minus_target(p: float, t: Any) -> float:
    d: float = p - t  # logistic + cross-entropy and identity + squared error: p - t
    return d


def _squared_error_on_logistic(p: float, t: Any) -> float:
    d: float = p - t
    return d * (p * (1.0 - p))  # chain through dp/dz = p (1 - p)


SCALAR_DELTA: dict[tuple[str, str], Callable[[float, Any], float]] = {
    ("logistic", "cross_entropy"): _output_minus_target,
    ("logistic", "squared_error"): _squared_error_on_logistic,
    ("identity", "squared_error"): _output_minus_target,
}
