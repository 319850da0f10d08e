"""Adam (Kingma & Ba, ICLR 2015) over one flat parameter vector."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine.errors import NonFiniteError
from engine.optimizers.base import Array, Optimizer

# Kingma & Ba (ICLR 2015), section 2: the suggested defaults.
ADAM_BETA1, ADAM_BETA2, ADAM_EPSILON = 0.9, 0.999, 1e-8


class Adam(Optimizer):
    """Kingma & Ba (2015): m, v moving moments of g' = s g + l2 w, bias-corrected step.

    Buffer rows [g, w, m_a, v_a, m_b, v_b, scratch, update]: the moments live in
    (m_a, v_a) or (m_b, v_b) in turn; a step writes the new ones into the other pair
    and swaps only once the step is known finite, so nothing is copied back. NumPy
    calls take `out` positionally (keyword parsing costs as much as a small pass).
    """

    kind = "adam"
    rows = 8
    state_vectors = 2  # the two moments
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

    def step_(self, grad_scale: float = 1.0) -> int:
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
        return 0

    def state_arrays(self) -> dict[str, Array]:
        return {"adam_m": self.first_moment.copy(), "adam_v": self.second_moment.copy()}

    def _assign(self, arrays: Mapping[str, NDArray[Any]]) -> None:
        # Elementwise passes only: which pair holds the moments does not change a bit.
        self._live = 0
        m, v = self._moments[0]
        m[...] = arrays["adam_m"]
        v[...] = arrays["adam_v"]

