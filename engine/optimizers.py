"""SGD with momentum (optionally Nesterov) and Adam over one flat parameter vector.

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
    swaps_params = False  # has begin_swapping / step_swapping_ / end_swapping (SGD)

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
        # The rows the weights can live in during a run of step_swapping_ (SGD).
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

    def begin_swapping(self) -> int:
        """Start a run of `step_swapping_` (only where `swaps_params`); returns the
        index in `weight_rows` of the row that holds the weights."""
        raise NotImplementedError

    def step_swapping_(self, grad_scale: float = 1.0) -> int:
        """`step_` inside a run: returns the index of the weights' row after it."""
        raise NotImplementedError

    def end_swapping(self) -> None:
        """End a run: the weights are in `params` again."""
        raise NotImplementedError

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

    Buffer rows [v_a, g, w, v_b, step, w_b]: the velocity lives in v_a or v_b in turn.
    With the rows evenly spaced, the whole new velocity mu v - lr s g - lr l2 w is
    one matrix-vector product of a coefficient triple with rows (v_a, g, w) or, the
    other way round, (g, w, v_b), written into the spare slot: one BLAS call
    instead of five elementwise passes.

    The online trainer steps with `step_swapping_` instead: the new velocity and the
    new weights, (v', w') = C (v, g, w) for a 2 x 3 coefficient matrix C (w' = w + v',
    or w + mu v' - lr g' with Nesterov, is one more linear combination of the same
    rows), come out of one matrix product into the spare rows, and the live rows
    swap. That reads three vectors and writes two where `step_` reads five and
    writes two, in one call instead of two (four with Nesterov). The weights then
    live in w or w_b in turn, so the trainer keeps views of both; `begin_swapping`
    and `end_swapping` bracket a run of such steps and leave them in w (the row
    `params` and the network are bound to) between runs. (v_a, g, w) are rows 0, 1, 2
    and (g, v_b, w_b) rows 1, 3, 5, each evenly spaced, as are the outputs (v_b, w_b)
    and (v_a, w), so each is one strided matrix for BLAS.

    Finiteness without a pass over the step: SGD keeps upper bounds on max |v_i| and
    max |w_i|. |v_new_i| <= mu |v_i| + lr s |g_i| + lr l2 |w_i| with |g_i| <= ||g||
    (already computed for clipping), so while the bounds stay below SAFE_BOUND no
    element can overflow and the step is finite by construction; past it the step
    is checked with a dot product and the bounds are measured afresh. Write `params`
    freely before the first step; after that, call `params_changed()`.
    """

    SAFE_BOUND = 1e150  # far below the float64 maximum (~1.8e308)

    kind = "sgd"
    rows = 6
    grad_row, params_row = 1, 2
    swaps_params = True

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
        # step_swapping_: the weight rows, inputs and outputs by live slot, and the
        # coefficient matrices (flat views to set entries by index). The weights live
        # in row w between runs; in a run, in the row of the velocity's slot.
        self.weight_rows = (b[2], b[5])
        self._swap_in = (b[0:3], b[1:6:2])  # (v_a, g, w) and (g, v_b, w_b)
        self._swap_out = (b[3:6:2], b[0:3:2])  # (v_b, w_b) and (v_a, w)
        self._swap_matrices = (np.zeros((2, 3)), np.zeros((2, 3)))
        self._swap_flat = (self._swap_matrices[0].reshape(-1),
                           self._swap_matrices[1].reshape(-1))
        self._swapping = False
        # The gradient's column of C: rows of (v_a, g, w) are 0, 1, 2, of (g, v_b, w_b) 1, 0, 2.
        self._swap_order = ((0, 1, 2), (1, 0, 2))
        if self._constant:
            for live in (0, 1):
                self._fill_swap_matrix(live, self.learning_rate, 0.0)

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
        velocity_bound, weight_bound, safe = self._bounds_after(self.params, lr, scale, raw)
        if not safe:
            # |update_i| < 1.3e154 when this is finite, so w + update cannot overflow.
            if not math.isfinite(float(np.dot(update, update))):
                raise NonFiniteError("the step would make a weight non-finite")
            velocity_bound = float(np.max(np.abs(new_velocity)))
            weight_bound = math.inf  # measured again at the next step
        np.add(self.params, update, self.params)
        self._velocity_bound, self._weight_bound = velocity_bound, weight_bound
        self._live = 1 - live
        self.step_count += 1

    def _bounds_after(self, weights: Array, lr: float, scale: float, raw: float
                      ) -> tuple[float, float, bool]:
        """Bounds on |v'_i| and |w'_i| after a step, from the bounds of its operands
        (`weights`: where the weights are now; `raw`: the squared gradient norm),
        and whether the update and the new weights are safely far from overflow."""
        weight_bound = self._weight_bound
        if weight_bound == math.inf:
            weight_bound = float(np.max(np.abs(weights)))
        momentum = self.momentum
        # max |g_i| <= ||g|| = sqrt(raw); the gradient's coefficient is -lr * scale.
        velocity_bound = (momentum * self._velocity_bound
                          + lr * abs(scale) * math.sqrt(raw) + lr * self.l2 * weight_bound)
        update_bound = velocity_bound if not self.nesterov else \
            (1.0 + momentum) * velocity_bound + momentum * self._velocity_bound
        weight_bound += update_bound
        safe = update_bound < self.SAFE_BOUND and weight_bound < self.SAFE_BOUND
        return velocity_bound, weight_bound, safe

    def _fill_swap_matrix(self, live: int, lr: float, scale: float) -> None:
        """C for the inputs of slot `live`: row 0 gives v', row 1 gives w'."""
        mu, a, b = self.momentum, -lr * scale, -lr * self.l2
        if self.nesterov:  # w' = w + mu v' + a g + b w, v' = mu v + a g + b w
            weight_row = (mu * mu, (1.0 + mu) * a, 1.0 + (1.0 + mu) * b)
        else:  # w' = w + v'
            weight_row = (mu, a, 1.0 + b)
        c = self._swap_flat[live]
        v_col, g_col, w_col = self._swap_order[live]
        c[v_col], c[g_col], c[w_col] = mu, a, b
        c[3 + v_col], c[3 + g_col], c[3 + w_col] = weight_row

    def begin_swapping(self) -> int:
        """Start a run of `step_swapping_`: the weights move to the live slot's row."""
        if self._live == 1:
            np.copyto(self.weight_rows[1], self.params)
        self._swapping = True
        return self._live

    def end_swapping(self) -> None:
        """End the run: the weights are back in `params` (row w)."""
        if self._swapping and self._live == 1:
            np.copyto(self.params, self.weight_rows[1])
        self._swapping = False

    def step_swapping_(self, grad_scale: float = 1.0) -> int:
        """`step_` between `begin_swapping` and `end_swapping`, by one matrix product
        into the spare rows (all or nothing: the rows swap only once it is finite).
        Returns which of `weight_rows` holds the weights now."""
        raw = float(self._grad_dot(self.grad))
        squared = raw * (grad_scale * grad_scale)
        scale = grad_scale if squared < self._clip_squared else self.clip_scale(grad_scale)
        live = self._live
        momentum = self.momentum
        if self._constant:
            lr = self.learning_rate
            a = -lr * scale
            c = self._swap_flat[live]
            g_col = 1 - live
            c[g_col] = a
            c[3 + g_col] = (1.0 + momentum) * a if self.nesterov else a
        else:
            lr = self.rate()
            self._fill_swap_matrix(live, lr, scale)
        out = self._swap_out[live]
        np.matmul(self._swap_matrices[live], self._swap_in[live], out)  # (positional out)
        velocity_bound, weight_bound, safe = self._bounds_after(
            self.weight_rows[live], lr, scale, raw)
        if not safe:
            # Rare: look at every new value (a sum of squares could overflow from
            # finite values this large), then measure the bounds afresh.
            if not np.isfinite(out).all():
                raise NonFiniteError("the step would make a weight non-finite")
            velocity_bound = float(np.max(np.abs(out[0])))
            weight_bound = math.inf
        self._velocity_bound, self._weight_bound = velocity_bound, weight_bound
        self._live = 1 - live
        self.step_count += 1
        return 1 - live

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

    Buffer rows [g, w, m_a, v_a, m_b, v_b, scratch, update]: the moments live in
    (m_a, v_a) or (m_b, v_b) in turn; a step writes the new ones into the other pair
    and swaps only once the step is known finite, so nothing is copied back. NumPy
    calls take `out` positionally (keyword parsing costs as much as a small pass).
    """

    kind = "adam"
    rows = 8
    grad_row, params_row = 0, 1

    def __init__(self, n_params: int, training: Mapping[str, Any]) -> None:
        super().__init__(n_params, training)
        b = self.buffer
        self._moments = ((b[2], b[3]), (b[4], b[5]))
        self._live = 0  # which pair holds (m, v)
        self._scratch, self._update = b[6], b[7]
        self._update_dot = self._update.dot

    @property
    def first_moment(self) -> Array:
        moment: Array = self._moments[self._live][0]
        return moment

    @property
    def second_moment(self) -> Array:
        moment: Array = self._moments[self._live][1]
        return moment

    def step_(self, grad_scale: float = 1.0) -> None:
        scale = self.clip_scale(grad_scale)
        g, w, s, update = self.grad, self.params, self._scratch, self._update
        multiply, add = np.multiply, np.add
        if scale != 1.0:
            multiply(g, scale, g)
        if self.l2 != 0.0:
            multiply(w, self.l2, s)
            add(g, s, g)
        b1, b2 = ADAM_BETA1, ADAM_BETA2
        live = self._live
        m, v = self._moments[live]
        m_new, v_new = self._moments[1 - live]
        multiply(m, b1, m_new)
        multiply(g, 1.0 - b1, s)
        add(m_new, s, m_new)
        multiply(v, b2, v_new)
        multiply(g, g, s)
        multiply(s, 1.0 - b2, s)
        add(v_new, s, v_new)
        t = self.step_count + 1
        # Bias correction folded into the step size (section 2 of the paper).
        step_size = self.rate() * math.sqrt(1.0 - b2**t) / (1.0 - b1**t)
        np.sqrt(v_new, s)
        add(s, ADAM_EPSILON * math.sqrt(1.0 - b2**t), s)
        np.divide(m_new, s, update)
        multiply(update, -step_size, update)
        if not math.isfinite(float(self._update_dot(update))):
            raise NonFiniteError("the step would make a weight non-finite")
        add(w, update, w)
        self._live = 1 - live
        self.step_count = t

    def state_arrays(self) -> dict[str, Array]:
        return {"adam_m": self.first_moment.copy(), "adam_v": self.second_moment.copy()}

    def _assign(self, arrays: Mapping[str, NDArray[Any]]) -> None:
        # Elementwise passes only: which pair holds the moments does not change a bit.
        self._live = 0
        m, v = self._moments[0]
        m[...] = arrays["adam_m"]
        v[...] = arrays["adam_v"]


def make_optimizer(n_params: int, training: Mapping[str, Any]) -> Optimizer:
    """The optimizer named by training['optimizer'] ('sgd' or 'adam')."""
    if training["optimizer"] == "adam":
        return Adam(n_params, training)
    return SGD(n_params, training)
