"""SGD with momentum (optionally Nesterov) and Adam over one flat parameter vector.

Each optimizer owns a row buffer that holds the live parameters, the gradient
and its state side by side; the network is bound to the parameter row, callers
write the gradient into `grad`, then call `step_`. A step is computed into spare
rows first and committed only once one scalar shows it is finite, so a
non-finite step raises NonFiniteError and changes nothing.

L2 weight decay adds l2 * w to the gradient of every parameter (biases too, as
PyTorch's `weight_decay`). `clip_norm` bounds the Euclidean norm of the loss
gradient (before the decay term) by rescaling it. The learning rate is constant
or, with `invscaling`, lr / t ** power_t at step t = 1, 2, ...
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine.errors import NonFiniteError, SnapshotError

Array = NDArray[np.float64]
# Kingma & Ba (ICLR 2015), section 2: the suggested defaults.
ADAM_BETA1, ADAM_BETA2, ADAM_EPSILON = 0.9, 0.999, 1e-8


class Optimizer:
    """Shared parts: the row buffer, clipping, learning-rate schedule, state."""

    kind = ""
    rows = 0  # rows of the buffer; subclasses name what each holds
    grad_row = 0
    params_row = 0

    def __init__(self, n_params: int, training: Mapping[str, Any]) -> None:
        self.learning_rate = float(training["learning_rate"])
        self.l2 = float(training["l2"])
        clip = training["clip_norm"]
        self.clip_norm = None if clip is None else float(clip)
        self.schedule = str(training["lr_schedule"])
        self.power_t = float(training["power_t"])
        self.step_count = 0
        # Below this squared gradient norm no clipping applies (NaN compares False).
        self._clip_squared = math.inf if clip is None else float(clip) ** 2
        self.buffer = np.zeros((self.rows, n_params))
        self.params: Array = self.buffer[self.params_row]
        self.grad: Array = self.buffer[self.grad_row]

    def rate(self) -> float:
        """Learning rate of the coming step."""
        if self.schedule == "invscaling":
            return self.learning_rate / math.pow(self.step_count + 1, self.power_t)
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

    def step_(self, grad_scale: float = 1.0) -> None:
        """Apply one step to `params` (mutates; all or nothing) for the loss gradient
        grad_scale * grad; `grad` may be overwritten.

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


class SGD(Optimizer):
    """v <- mu v - lr (s g + l2 w);  w <- w + v  (Nesterov: w <- w + mu v_new - lr g').

    Buffer rows [v_a, g, w, v_b, step]: the velocity lives in v_a or v_b in turn.
    With the rows evenly spaced, the whole new velocity mu v - lr s g - lr l2 w is
    one matrix-vector product of a coefficient triple with rows (v_a, g, w) or, the
    other way round, (g, w, v_b), written into the spare slot: one BLAS call
    instead of five elementwise passes.

    Finiteness without a pass over the step: SGD keeps upper bounds on max |v_i| and
    max |w_i|. |v_new_i| <= mu |v_i| + lr s |g_i| + lr l2 |w_i| with |g_i| <= ||g||
    (already computed for clipping), so while the bounds stay below SAFE_BOUND no
    element can overflow and the step is finite by construction; past it the step
    is checked with a dot product and the bounds are measured afresh. Write `params`
    freely before the first step; after that, call `params_changed()`.
    """

    SAFE_BOUND = 1e150  # far below the float64 maximum (~1.8e308)

    kind = "sgd"
    rows = 5
    grad_row, params_row = 1, 2

    def __init__(self, n_params: int, training: Mapping[str, Any]) -> None:
        super().__init__(n_params, training)
        self.momentum = float(training["momentum"])
        self.nesterov = bool(training["nesterov"])
        b = self.buffer
        self._triples = (b[0:3], b[1:4])  # (v_a, g, w) and (g, w, v_b)
        self._slots = (b[0], b[3])
        self._step = b[4]
        self._live = 0  # index of the slot holding the velocity
        self._coefficients = np.zeros(3)
        # Constant rate: only the gradient's coefficient changes from step to step.
        decay = -self.learning_rate * self.l2
        self._fixed = (np.array([self.momentum, 0.0, decay]),
                       np.array([0.0, decay, self.momentum]))
        self._constant = self.schedule == "constant"
        self._fixed_dots = (self._fixed[0].dot, self._fixed[1].dot)
        self._coefficients_dot = self._coefficients.dot
        self._grad_dot = self.grad.dot
        self._velocity_bound = 0.0  # the velocity starts at zero
        self._weight_bound = math.inf  # measured at the first step

    def params_changed(self) -> None:
        """Forget the weight bound after `params` were written from outside."""
        self._weight_bound = math.inf

    @property
    def velocity(self) -> Array:
        live: Array = self._slots[self._live]
        return live

    def step_(self, grad_scale: float = 1.0) -> None:
        # clip_scale inlined, and bound `.dot` methods: this runs once per record.
        raw = float(self._grad_dot(self.grad))
        squared = raw * (grad_scale * grad_scale)
        scale = grad_scale if squared < self._clip_squared else self.clip_scale(grad_scale)
        live = self._live
        momentum = self.momentum
        # Coefficients follow the rows of the triple in use: (v_a, g, w) or (g, w, v_b).
        if self._constant:
            lr = self.learning_rate
            c = self._fixed[live]
            c[1 - live] = -lr * scale
            combine = self._fixed_dots[live]
        else:
            lr = self.rate()
            c = self._coefficients
            c[0], c[1], c[2] = ((momentum, -lr * scale, -lr * self.l2) if live == 0
                                else (-lr * scale, -lr * self.l2, momentum))
            combine = self._coefficients_dot
        new_velocity = self._slots[1 - live]
        combine(self._triples[live], new_velocity)
        update = new_velocity
        if self.nesterov:
            # w + mu v_new - lr g' = w + v_new + mu (v_new - v), as -lr g' = v_new - mu v.
            update = self._step
            np.subtract(new_velocity, self._slots[live], update)
            np.multiply(update, momentum, update)
            np.add(update, new_velocity, update)
        # Bounds of the new velocity and of the update, from the bounds of the operands.
        weight_bound = self._weight_bound
        if weight_bound == math.inf:
            weight_bound = float(np.max(np.abs(self.params)))
        # max |g_i| <= ||g|| = sqrt(raw); the gradient's coefficient is -lr * scale.
        velocity_bound = (momentum * self._velocity_bound
                          + lr * abs(scale) * math.sqrt(raw) + lr * self.l2 * weight_bound)
        update_bound = velocity_bound if not self.nesterov else \
            (1.0 + momentum) * velocity_bound + momentum * self._velocity_bound
        weight_bound += update_bound
        if not (update_bound < self.SAFE_BOUND and weight_bound < self.SAFE_BOUND):
            # |update_i| < 1.3e154 when this is finite, so w + update cannot overflow.
            if not math.isfinite(float(np.dot(update, update))):
                raise NonFiniteError("the step would make a weight non-finite")
            velocity_bound = float(np.max(np.abs(new_velocity)))
            weight_bound = math.inf  # measured again at the next step
        np.add(self.params, update, self.params)
        self._velocity_bound, self._weight_bound = velocity_bound, weight_bound
        self._live = 1 - live
        self.step_count += 1

    def state_arrays(self) -> dict[str, Array]:
        return {"velocity": self.velocity.copy()}

    def _assign(self, arrays: Mapping[str, NDArray[Any]]) -> None:
        # The slot alternates with every step; restoring into the slot an uninterrupted
        # run would use keeps the summation order, hence the bits, the same.
        self._live = self.step_count % 2
        self._slots[self._live][...] = arrays["velocity"]
        self._velocity_bound = float(np.max(np.abs(arrays["velocity"]), initial=0.0))
        self._weight_bound = math.inf


class Adam(Optimizer):
    """Kingma & Ba (2015): m, v moving moments of g' = s g + l2 w, bias-corrected step.

    Buffer rows [g, w, m, v, m_new, v_new, scratch, update].
    """

    kind = "adam"
    rows = 8
    grad_row, params_row = 0, 1

    def __init__(self, n_params: int, training: Mapping[str, Any]) -> None:
        super().__init__(n_params, training)
        b = self.buffer
        self._m, self._v, self._m_new, self._v_new = b[2], b[3], b[4], b[5]
        self._scratch, self._update = b[6], b[7]

    @property
    def first_moment(self) -> Array:
        moment: Array = self._m
        return moment

    @property
    def second_moment(self) -> Array:
        moment: Array = self._v
        return moment

    def step_(self, grad_scale: float = 1.0) -> None:
        scale = self.clip_scale(grad_scale)
        g, w, s = self.grad, self.params, self._scratch
        if scale != 1.0:
            np.multiply(g, scale, out=g)
        if self.l2 != 0.0:
            np.multiply(w, self.l2, out=s)
            np.add(g, s, out=g)
        b1, b2 = ADAM_BETA1, ADAM_BETA2
        np.multiply(self._m, b1, out=self._m_new)
        np.multiply(g, 1.0 - b1, out=s)
        np.add(self._m_new, s, out=self._m_new)
        np.multiply(self._v, b2, out=self._v_new)
        np.multiply(g, g, out=s)
        np.multiply(s, 1.0 - b2, out=s)
        np.add(self._v_new, s, out=self._v_new)
        t = self.step_count + 1
        # Bias correction folded into the step size (section 2 of the paper).
        step_size = self.rate() * math.sqrt(1.0 - b2**t) / (1.0 - b1**t)
        np.sqrt(self._v_new, out=s)
        np.add(s, ADAM_EPSILON * math.sqrt(1.0 - b2**t), out=s)
        np.divide(self._m_new, s, out=self._update)
        np.multiply(self._update, -step_size, out=self._update)
        if not math.isfinite(float(np.dot(self._update, self._update))):
            raise NonFiniteError("the step would make a weight non-finite")
        np.add(w, self._update, out=w)
        self._m[...] = self._m_new
        self._v[...] = self._v_new
        self.step_count = t

    def state_arrays(self) -> dict[str, Array]:
        return {"adam_m": self._m.copy(), "adam_v": self._v.copy()}

    def _assign(self, arrays: Mapping[str, NDArray[Any]]) -> None:
        self._m[...] = arrays["adam_m"]
        self._v[...] = arrays["adam_v"]


def make_optimizer(n_params: int, training: Mapping[str, Any]) -> Optimizer:
    """The optimizer named by training['optimizer'] ('sgd' or 'adam')."""
    if training["optimizer"] == "adam":
        return Adam(n_params, training)
    return SGD(n_params, training)
