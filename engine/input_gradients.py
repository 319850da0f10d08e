"""Gradients of one head output with respect to the inputs: the attribution passes.

One forward and one backward pass of engine.kernel, started from a row of the
head's Jacobian (d output / d logits) instead of from a loss. The examples of a
pass are the points to differentiate, then x, then the baseline, so the values
at x and at the baseline come from the same pass.

`gradient_at` is one point (x itself), the latency path of an explained
prediction: a single-output head runs in its scalar forms. `explained_pass` is
many points (integrated gradients' nodes, smoothgrad's samples) whose gradients
are summed with weights before the last product.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from .activations import HEADS
from .kernel import Workspace, backward, forward
from .network import Network

# An explained pass: (head unit, its value at x, at the baseline, the input gradient).
Explained = tuple[int, float, float, NDArray[np.float64]]


def gradient_at(network: Network, x: NDArray[np.float64], baseline: NDArray[np.float64],
                unit: int | None) -> Explained:
    """The head unit explained (None: the most probable at x), its value at x and at
    the baseline, and its gradient with respect to the inputs at x (n_inputs,).

    x and the baseline go forward together, x alone backward. This is the latency
    path of an explained prediction: a single-output head runs in its scalar forms.
    """
    work = network.workspace(2, 1)
    try:
        x_column, baseline_column = work.columns
        x_column[...] = x
        baseline_column[...] = baseline
        forward(work, work.inputs)
        head = HEADS[network.output]
        value_of, slope = head.value, head.slope
        if value_of is None or slope is None:  # softmax: the array forms
            return _explained(network, work, unit, None)
        ((value, baseline_value),) = work.logits.tolist()
        value, baseline_value = value_of(value), value_of(baseline_value)
        gradient = backward(work, work.inputs, 0, slope(value))
        assert gradient is not None  # an attributing workspace returns it
        return 0, value, baseline_value, gradient
    finally:
        network.release(work)


def _explained(network: Network, work: Workspace, unit: int | None,
               row_weights: NDArray[np.float64] | None) -> Explained:
    """The rest of an explained pass after `forward`, in the heads' array forms. The
    workspace's examples are the points to differentiate (its grad_rows), then x,
    then the baseline (a single point is x itself). Returns the head unit explained
    (None: the most probable at x), its value at x and at the baseline, and its
    gradient with respect to the inputs at the point, or the `row_weights`-weighted
    sum of the gradients at the points."""
    head = HEADS[network.output]
    p = head.activate_(work.outputs)  # (rows, k)
    if unit is None:
        unit = int(p[-2].argmax()) if p.shape[1] > 1 else 0
    value, baseline_value = p[-2:, unit].tolist()
    head.jacobian_row(p[: work.grad_rows], unit, work.delta.T)
    gradient = backward(work, work.inputs, 0, None, row_weights)
    assert gradient is not None  # an attributing workspace returns it
    return unit, value, baseline_value, gradient


def explained_pass(network: Network, work: Workspace, unit: int | None,
                   row_weights: NDArray[np.float64] | None = None) -> Explained:
    """`_explained` after a forward pass of the workspace's examples (integrated
    gradients, smoothgrad: many points, their gradients summed)."""
    forward(work, work.inputs)
    return _explained(network, work, unit, row_weights)
