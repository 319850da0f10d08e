"""SGD with momentum (optionally Nesterov) over one flat parameter vector."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine.errors import NonFiniteError
from engine.optimizers.base import Array, Optimizer, Step


class SGD(Optimizer):
    """v <- mu v - lr (s g + l2 w);  w <- w + v  (Nesterov: w <- w + mu v_new - lr g').

    Buffer rows [v_a, g, w, v_b, step, w_b]: the velocity lives in v_a or v_b in turn.
    With the rows evenly spaced, the whole new velocity mu v - lr s g - lr l2 w is
    one matrix-vector product of a coefficient triple with rows (v_a, g, w) or, the
    other way round, (g, w, v_b), written into the spare slot: one BLAS call
    instead of five elementwise passes.

    A run of steps (`begin_run`, the online trainer's) steps differently: the new
    velocity and the new weights, (v', w') = C (v, g, w) for a 2 x 3 coefficient
    matrix C (w' = w + v', or w + mu v' - lr g' with Nesterov, is one more linear
    combination of the same rows), come out of one matrix product into the spare
    rows, and the live rows swap. That reads three vectors and writes two where
    `step_` reads five and writes two, in one call instead of two (four with
    Nesterov). The weights then live in w or w_b in turn (`weight_rows`; each step
    says which), and `end_run` leaves them in w, the row `params` and the network
    are bound to, between runs. (v_a, g, w) are rows 0, 1, 2 and (g, v_b, w_b)
    rows 1, 3, 5, each evenly spaced, as are the outputs (v_b, w_b) and (v_a, w),
    so each is one strided matrix for BLAS.

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
    state_vectors = 1  # the velocity
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
        # Runs of steps (_step_swapping_): the weight rows, inputs and outputs by live
        # slot, and the coefficient matrices (flat views to set entries by index). The
        # weights live in row w between runs; in a run, in the row of the velocity's slot.
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

    def step_(self, grad_scale: float = 1.0) -> int:
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
        return 0

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

    def begin_run(self) -> tuple[Step, int]:
        """A run steps by `_step_swapping_`; the weights move to the live slot's row."""
        if self._live == 1:
            np.copyto(self.weight_rows[1], self.params)
        self._swapping = True
        return self._step_swapping_, self._live

    def end_run(self) -> None:
        if self._swapping and self._live == 1:
            np.copyto(self.params, self.weight_rows[1])
        self._swapping = False

    def _step_swapping_(self, grad_scale: float = 1.0) -> int:
        """`step_` in a run, by one matrix product into the spare rows (all or
        nothing: the rows swap only once it is finite). Returns which of
        `weight_rows` holds the weights now."""
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

