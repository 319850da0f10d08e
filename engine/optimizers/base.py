"""The shared part of the optimizers: the row buffer, clipping, the learning-rate
schedule, runs of steps, and state for snapshots.

Each optimizer owns a row buffer that holds the live parameters, the gradient
and its state side by side; the network is bound to the parameter row, callers
write the gradient into `grad`, then call `step_`. A step is computed into spare
rows first and committed only once one scalar shows it is finite, so a
non-finite step raises NonFiniteError and changes nothing.

L2 weight decay adds l2 * w to the gradient of every parameter (biases too, as
PyTorch's `weight_decay`). `clip_norm` bounds the Euclidean norm of the loss
gradient (before the decay term) by rescaling it. The learning rate is constant
or, with `inverse_power`, lr / t ** decay_exponent at step t = 1, 2, ...
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine.errors import NonFiniteError, SnapshotError

Array = NDArray[np.float64]
Step = Callable[[float], int]


class Optimizer:
    """Shared parts: the row buffer, clipping, learning-rate schedule, state."""

    kind = ""
    rows = 0  # rows of the buffer; subclasses name what each holds
    # Parameter-sized vectors `state_arrays` returns (what a snapshot stores
    # beside the weights; engine.sizes counts with it).
    state_vectors = 0
    grad_row = 0
    params_row = 0

    def __init__(self, n_params: int, training: Mapping[str, Any]) -> None:
        self.learning_rate = float(training["learning_rate"])
        self.l2 = float(training["l2"])
        clip = training["clip_norm"]
        self.clip_norm = None if clip is None else float(clip)
        self.schedule = str(training["lr_schedule"])
        self.decay_exponent = float(training["decay_exponent"])
        self.step_count = 0
        # Below this squared gradient norm no clipping applies (NaN compares False).
        self._clip_squared = math.inf if clip is None else float(clip) ** 2
        self.buffer = np.zeros((self.rows, n_params))
        self.params: Array = self.buffer[self.params_row]
        self.grad: Array = self.buffer[self.grad_row]
        # The rows the weights can live in during a run of steps (see begin_run).
        self.weight_rows: tuple[Array, ...] = (self.params,)

    def rate(self) -> float:
        """Learning rate of the coming step."""
        if self.schedule == "inverse_power":
            return self.learning_rate / math.pow(self.step_count + 1, self.decay_exponent)
        return self.learning_rate

    def clip_scale(self, grad_scale: float = 1.0) -> float:
        """Factor on `grad` that gives the gradient grad_scale * grad, clipped to clip_norm.

        Raises NonFiniteError if the gradient is not finite: one dot product checks
        every element, since any NaN or inf (or an overflow) makes it non-finite.
        """
        g = self.grad
        squared = float(np.dot(g, g)) * (grad_scale * grad_scale)
        if not math.isfinite(squared):
            raise NonFiniteError("the gradient is not finite")
        clip = self.clip_norm
        if clip is not None and squared > clip * clip:
            return grad_scale * (clip / math.sqrt(squared))
        return grad_scale

    def params_changed(self) -> None:
        """Tell the optimizer `params` were written from outside (no-op unless it keeps
        bounds on them)."""

    def begin_run(self) -> tuple[Step, int]:
        """Start a run of steps, one per record (the online trainer's): returns the
        step to call for each gradient and the index in `weight_rows` of the row the
        weights are in. The step returns that index after it: an optimizer may move
        the weights between the rows as it steps (views of every row stay valid).
        `end_run` puts them back in `params`; nothing else may read or write the
        weights in between."""
        return self.step_, 0

    def end_run(self) -> None:
        """End a run of steps: the weights are in `params` again."""

    def step_(self, grad_scale: float = 1.0) -> int:
        """Apply one step to `params` (mutates; all or nothing) for the loss gradient
        grad_scale * grad; `grad` may be overwritten. Returns 0, the index of
        `params` in `weight_rows` (the form `begin_run` hands out).

        The scale lets a single-output network backpropagate d output / d params once
        and fold dLoss/doutput into the step instead of into every layer.
        """
        raise NotImplementedError

    # ---------------------------------------------------------------- state
    def state_arrays(self) -> dict[str, Array]:
        """Optimizer state to snapshot (copies), keyed by name."""
        raise NotImplementedError

    def load_state(self, arrays: Mapping[str, NDArray[Any]], step_count: int) -> None:
        """Restore what `state_arrays` returned; SnapshotError if it does not fit."""
        names = self.state_arrays().keys()
        for name in names:
            value = arrays.get(name)
            if value is None or value.shape != self.params.shape or value.dtype != np.float64:
                raise SnapshotError(f"optimizer state {name!r} is missing or has a wrong shape")
            if not np.all(np.isfinite(value)):
                raise SnapshotError(f"optimizer state {name!r} is not finite")
        self.step_count = int(step_count)
        self._assign(arrays)

    def _assign(self, arrays: Mapping[str, NDArray[Any]]) -> None:
        raise NotImplementedError

