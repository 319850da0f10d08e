"""engine.sweeps: individual conditional expectation curves (Goldstein,
Kapelner, Bleich and Pitkin 2015, JCGS 24(1)): each point is the learner's
prediction of the record with one field set to x; checked against predict on
those records built by hand."""

from __future__ import annotations

import numpy as np
import pytest

import engine

SPEC = {"name": "m", "task": "binary", "target": "y", "classes": [False, True],
        "features": [{"name": "a", "type": "numeric", "min": 0, "max": 10},
                     {"name": "b", "type": "numeric"},
                     {"name": "c", "type": "categorical", "levels": ["x", "z"]}]}


@pytest.fixture(scope="module")
def learner() -> engine.Learner:
    rng = np.random.default_rng(1)
    rows = [{"a": float(rng.uniform(0, 10)), "b": float(rng.normal(50, 4)),
             "c": "x" if rng.random() < 0.5 else "z"} for _ in range(300)]
    labels = [row["a"] + (row["b"] - 50) / 4 > 5 for row in rows]
    model = engine.Learner.create(engine.apply_defaults(SPEC), warmup=rows,
                                  warmup_labels=labels)
    model.learn(model.encode(rows), model.encode_labels(labels))
    return model


def test_each_point_is_the_prediction_of_that_record(learner: engine.Learner) -> None:
    row = {"a": 2.5, "b": 47.0, "c": "z"}
    grids = {name: engine.sweep_grid(learner, name, 9) for name in ("a", "b")}
    swept = engine.sweep(learner, row, grids)
    for name, xs in grids.items():
        by_hand = learner.predict(learner.encode([{**row, name: float(x)} for x in xs]))
        # One batch against another of another size: equal up to the matrix
        # product's summation order (common practice, no source).
        np.testing.assert_allclose(swept[name], by_hand, rtol=0, atol=1e-12)


def test_the_grid_spans_the_declared_range_or_three_learned_sds(
        learner: engine.Learner) -> None:
    assert engine.sweep_grid(learner, "a", 5).tolist() == [0.0, 2.5, 5.0, 7.5, 10.0]
    b = engine.sweep_grid(learner, "b", 3)
    column = learner.encoder.fields.index("b")  # numeric columns come one per field
    center, scale = learner.encoder.center[column], learner.encoder.scale[column]
    np.testing.assert_allclose(b, [center - 3 * scale, center, center + 3 * scale])


def test_only_numeric_fields_are_swept(learner: engine.Learner) -> None:
    with pytest.raises(engine.InvalidInputError):
        engine.sweep_grid(learner, "c", 5)
    with pytest.raises(engine.InvalidInputError):
        engine.sweep_grid(learner, "a", 1)
