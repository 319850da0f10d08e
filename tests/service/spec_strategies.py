"""Hypothesis strategies for model specs and records that fit them: shared by
the property tests of the records contract (tests/service/test_record_rules.py,
tests/reliability/test_record_properties.py)."""

from __future__ import annotations

import math
from typing import Any

from hypothesis import strategies as st

RESERVED = {"key", "explain", "version", "output", "steps", "samples", "noise", "seed",
            "baseline"}
names = st.from_regex(r"[A-Za-z_][A-Za-z0-9_]{0,8}", fullmatch=True).filter(
    lambda n: n not in RESERVED)
finite = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False)
level = st.text(alphabet="abcdefghij-_ ", min_size=1, max_size=6)


@st.composite
def feature(draw: st.DrawFn, name: str) -> dict[str, Any]:
    kind = draw(st.sampled_from(["numeric", "categorical", "boolean"]))
    spec: dict[str, Any] = {"name": name, "type": kind}
    if kind == "numeric":
        low = draw(st.none() | finite)
        high = draw(st.none() | finite)
        if low is not None and high is not None and not low < high:
            low, high = None, None
        if low is not None:
            spec["min"] = low
        if high is not None:
            spec["max"] = high
    elif kind == "categorical":
        spec["levels"] = draw(st.lists(level, min_size=1, max_size=4, unique=True))
    return spec


@st.composite
def model_spec(draw: st.DrawFn) -> dict[str, Any]:
    fields = draw(st.lists(names, min_size=2, max_size=7, unique_by=str.lower))
    target, features = fields[0], fields[1:]
    task = draw(st.sampled_from(["binary", "multiclass", "regression"]))
    spec: dict[str, Any] = {"task": task, "target": target,
                            "features": [draw(feature(n)) for n in features]}
    if task != "regression":
        count = 2 if task == "binary" else draw(st.integers(2, 5))
        spec["classes"] = draw(st.one_of(
            st.lists(level, min_size=count, max_size=count, unique=True),
            st.lists(st.integers(-5, 50), min_size=count, max_size=count, unique=True)))
    return spec


def value_for(draw: st.DrawFn, feature: dict[str, Any]) -> Any:
    if feature["type"] == "boolean":
        return draw(st.booleans())
    if feature["type"] == "categorical":
        return draw(st.sampled_from(feature["levels"]))
    low, high = feature.get("min", -1e6), feature.get("max", 1e6)
    return draw(st.one_of(st.floats(low, high), st.integers(math.ceil(low),
                                                             math.floor(high)) if
                          math.ceil(low) <= math.floor(high) else st.floats(low, high)))


@st.composite
def valid_batch(draw: st.DrawFn, spec: dict[str, Any]) -> list[dict[str, Any]]:
    batch = []
    for _ in range(draw(st.integers(1, 4))):
        row = {"features": {f["name"]: value_for(draw, f) for f in spec["features"]}}
        row["label"] = (draw(st.sampled_from(spec["classes"])) if "classes" in spec
                        else draw(finite))
        batch.append(row)
    return batch
