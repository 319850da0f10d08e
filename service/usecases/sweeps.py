"""Use case: sweeps of one record (POST /v1/models/{name}/sweeps).

Per numeric field, the version's output as that field moves across its range
while the others stay as given (engine.sweeps). Classification answers the
probability of one class (given as ``output``, else the class the record as
given is predicted to be); regression the value. Read-only; the version comes
from the cache, as a prediction's does.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import engine
from service.errors import InvalidInputError
from service.usecases.predictions import (
    NonFiniteOutputError,
    class_key,
    load_version,
)
from service.versions.cache import ModelEntry, VersionCache

DEFAULT_POINTS, MIN_POINTS, MAX_POINTS = 25, 2, 201
# Rows scored per request, whatever the number of fields: a bound on its cost.
MAX_SWEEP_ROWS = 20_000


def sweep_record(cache: VersionCache, entry: ModelEntry, row: Mapping[str, Any], *,
                 fields: Sequence[str] | None, points: int, output: Any,
                 version: int | None) -> dict[str, Any]:
    """The answer: the version's number, the class swept (None: regression)
    and per field its x values, the outputs and the record's own value."""
    loaded = load_version(cache, entry, version)
    learner = loaded.learner
    encoder = learner.encoder
    numeric = [name for name, kind in zip(encoder.fields, encoder.kinds, strict=True)
               if kind == "numeric"]
    chosen = list(numeric if fields is None else fields)
    if len(set(chosen)) != len(chosen):
        raise InvalidInputError("A field is named twice.", errors={
            "fields": ["Name each field once."]})
    not_numeric = [name for name in chosen if name not in numeric]
    if not_numeric:
        raise InvalidInputError("Only numeric fields are swept.", errors={
            "fields": [f"{name!r} is not a numeric field of the model." for name in not_numeric]})
    if len(chosen) * points > MAX_SWEEP_ROWS:
        raise InvalidInputError(
            f"At most {MAX_SWEEP_ROWS} points per request (fields x points).",
            errors={"points": [f"{len(chosen)} fields x {points} points is over "
                               f"{MAX_SWEEP_ROWS}."]})
    grids = {name: engine.sweep_grid(learner, name, points) for name in chosen}
    swept = engine.sweep(learner, row, grids)
    column, shown = _column(learner, row, output)
    sweeps = []
    for name in chosen:
        ys = swept[name][:, column].tolist()
        if not all(math.isfinite(y) for y in ys):
            raise NonFiniteOutputError(
                f"The output overflows as {name!r} moves across its range.",
                errors={f"fields.{name}": ["The output is not finite somewhere on the range."]})
        sweeps.append({"field": name, "x": grids[name].tolist(), "y": ys,
                       "current": row[name]})
    return {"model": entry.name, "version": loaded.number, "output": shown,
            "sweeps": sweeps}


def _column(learner: Any, row: Mapping[str, Any], output: Any) -> tuple[int, str | None]:
    """The output column swept and the class it is (spelled as a JSON key)."""
    if learner.task == "regression":
        return 0, None
    classes = learner.classes
    if output is None:
        scores = learner.predict(learner.encode([row]))[0]
        index = int(scores.argmax())
    else:
        index = next(i for i, label in enumerate(classes)
                     if type(label) is type(output) and label == output)
    return index, class_key(classes[index])
