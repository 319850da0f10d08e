"""The schemas generated from a spec, and the fast loader held to them: for
any input, the fast loader either returns exactly what the marshmallow schema
loads, or declines (None) and leaves the errors to the schema."""

from __future__ import annotations

import math
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from marshmallow import ValidationError

from service.web.schemas.records import fast_record_loader, feature_schema, record_schema

SPEC: dict[str, Any] = {
    "task": "binary",
    "classes": ["ok", "failed"],
    "features": [
        {"name": "vibration_rms", "type": "numeric", "min": 0, "max": 100},
        {"name": "pump_family", "type": "categorical", "levels": ["centrifugal", "screw"]},
        {"name": "has_vfd", "type": "boolean"},
        {"name": "head_m", "type": "numeric"},
    ],
}
REGRESSION = {**SPEC, "task": "regression", "classes": None}
INT_CLASSES = {**SPEC, "task": "multiclass", "classes": [1, 2, 3]}

json_scalars = st.one_of(
    st.none(), st.booleans(), st.integers(min_value=-(10**400), max_value=10**400),
    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=4),
    st.sampled_from(["ok", "failed", "screw", "centrifugal", "", "1", "true"]),
    st.sampled_from([0, 1, 2, 3, 100, 100.5, -0.0, True, False]),
)
values = st.one_of(json_scalars, st.lists(json_scalars, max_size=2),
                   st.dictionaries(st.text(max_size=3), json_scalars, max_size=2))
names = st.sampled_from(["vibration_rms", "pump_family", "has_vfd", "head_m", "extra"])
features = st.dictionaries(names, values, max_size=5)
good_features = st.fixed_dictionaries({
    "vibration_rms": st.one_of(st.integers(0, 100), st.floats(0, 100)),
    "pump_family": st.sampled_from(["centrifugal", "screw"]),
    "has_vfd": st.booleans(),
    "head_m": st.floats(allow_nan=False, allow_infinity=False),
})
records = st.one_of(
    st.fixed_dictionaries(
        {"features": st.one_of(good_features, features), "label": values},
        optional={"key": st.one_of(st.text(max_size=3), values), "extra": values},
    ),
    values,
)


def schema_load(spec: dict[str, Any], batch: list[Any]) -> list[dict[str, Any]] | None:
    try:
        loaded: list[dict[str, Any]] = record_schema(spec).load(batch, many=True)
    except ValidationError:
        return None
    return loaded


@pytest.mark.parametrize("spec", [SPEC, REGRESSION, INT_CLASSES], ids=["binary", "reg", "int"])
@settings(max_examples=300, deadline=None)
@given(batch=st.lists(records, min_size=1, max_size=3))
def test_the_fast_loader_agrees_with_the_schema(spec: dict[str, Any], batch: list[Any]) -> None:
    fast = fast_record_loader(spec)(batch)
    if fast is not None:
        assert fast == schema_load(spec, batch)
        for out, sent in zip(fast, batch, strict=True):
            assert all(type(out["features"][n]) is float
                       for n in ("vibration_rms", "head_m"))
            assert set(out) <= set(sent)


@settings(max_examples=200, deadline=None)
@given(row=good_features, label=st.sampled_from(["ok", "failed"]),
       key=st.text(st.characters(exclude_characters="\x00"), min_size=1, max_size=20))
def test_valid_records_take_the_fast_path(row: dict[str, Any], label: str, key: str) -> None:
    batch = [{"key": key, "features": row, "label": label}]
    fast = fast_record_loader(SPEC)(batch)
    assert fast is not None and fast == schema_load(SPEC, batch)


@pytest.mark.parametrize("value", [math.nan, math.inf, -math.inf, 10**400, True, "1", None])
def test_non_numbers_are_refused_by_both(value: Any) -> None:
    batch = [{"features": {"vibration_rms": value, "pump_family": "screw", "has_vfd": True,
                           "head_m": 1.0}, "label": "ok"}]
    assert fast_record_loader(SPEC)(batch) is None
    assert schema_load(SPEC, batch) is None


def test_text_values_are_read_by_the_text_schema_with_the_same_rules() -> None:
    schema = feature_schema(SPEC, text=True)
    row = {"vibration_rms": " 4.5", "pump_family": "screw", "has_vfd": "TRUE", "head_m": "-3"}
    assert schema.load(row) == {"vibration_rms": 4.5, "pump_family": "screw", "has_vfd": True,
                                "head_m": -3.0}
    with pytest.raises(ValidationError) as bad:
        schema.load({**row, "vibration_rms": "inf", "has_vfd": "yes", "pump_family": "Screw"})
    assert set(bad.value.messages) == {"vibration_rms", "has_vfd", "pump_family"}


def test_schemas_are_built_once_per_spec() -> None:
    assert feature_schema(SPEC) is feature_schema(dict(SPEC))
    assert record_schema(SPEC) is not record_schema(REGRESSION)
