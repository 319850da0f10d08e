"""Sweeps: a model's output as one numeric field of a record moves across its
range while every other field stays as given (an individual conditional
expectation curve, Goldstein, Kapelner, Bleich and Pitkin 2015, "Peeking
Inside the Black Box", JCGS 24(1)).

Every point of every swept field is one row of a single batch: encoded by the
learner's encoder and scored by one forward pass of the shared kernel, the
same path a batch of predictions takes, so a sweep point and a prediction of
the same record agree up to the summation order of a batch's matrix product.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine.errors import InvalidInputError
from engine.learner import Learner

# A field without a declared bound sweeps this many standard deviations of
# what the model learned from on that side of the mean.
UNDECLARED_SPREAD = 3.0


def sweep_grid(learner: Learner, field: str, points: int) -> NDArray[np.float64]:
    """``points`` evenly spaced values across the field's range (its declared
    min and max; mean -/+ UNDECLARED_SPREAD SDs where one is not declared)."""
    if points < 2:
        raise InvalidInputError("a sweep needs at least 2 points", field="points")
    if field not in learner.encoder.fields:
        raise InvalidInputError(f"unknown field {field!r}", field=field)
    low, high = learner.encoder.numeric_span(field, UNDECLARED_SPREAD)
    return np.linspace(low, high, points)


def sweep(learner: Learner, row: Mapping[str, Any],
          grids: Mapping[str, Sequence[float] | NDArray[np.float64]]
          ) -> dict[str, NDArray[np.float64]]:
    """Per field, the learner's outputs (points, n_outputs), as ``predict``
    answers them, for ``row`` with that field set to each value of its grid."""
    rows: list[Mapping[str, Any]] = []
    for field, values in grids.items():
        rows.extend({**row, field: float(value)} for value in values)
    if not rows:
        return {}
    scores = learner.predict(learner.encode(rows))
    out: dict[str, NDArray[np.float64]] = {}
    start = 0
    for field, values in grids.items():
        out[field] = scores[start:start + len(values)]
        start += len(values)
    return out
