"""A spec's compiled rules, held together on random specs and broken records:

- the fast checkers (records, outcomes) return exactly what the marshmallow
  schemas load, and decline (None) exactly when the schemas refuse;
- the published JSON Schema 2020-12 documents (record, outcome, prediction
  request) call valid exactly what the API's own checks accept;
- the generic record of the OpenAPI document admits every record some model
  accepts (it states the rules all models share).

Checked with the jsonschema library, a reference implementation of the
JSON Schema specification (draft 2020-12).
"""

from __future__ import annotations

import copy
import math
from collections.abc import Callable
from typing import Any

import jsonschema
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from marshmallow import ValidationError
from werkzeug.datastructures import MultiDict

from service.errors import InvalidInputError
from service.web.schemas.json_schema import json_schema, model_documents
from service.web.schemas.predictions import build_readers
from service.web.schemas.rules import RecordRules, rules_for
from service.web.schemas.views import RecordBatchSchema
from tests.service.spec_strategies import model_spec, valid_batch

LIMITS = {"max_records": 50, "max_predictions": 20}
EXAMPLES = settings(max_examples=150, deadline=None, suppress_health_check=list(HealthCheck))

# Values a client could send in JSON (so NaN and infinity only where parsing
# would have caught them first), biased towards the edges of the rules.
json_values = st.recursive(
    st.one_of(
        st.none(), st.booleans(), st.integers(), st.floats(allow_nan=False, allow_infinity=False),
        st.sampled_from([0, 1, 2, -1, 1.0, 2.0, -0.0, 1e6, -1e6, 1e308, 2 ** 1024, -(2 ** 1024),
                         int(1.7976931348623157e308) + 1, True, False]),
        st.text(max_size=4), st.sampled_from(["", "a", "1", "true", "x" * 201, "k\x00"]),
    ),
    lambda inner: st.lists(inner, max_size=2) | st.dictionaries(st.text(max_size=3), inner,
                                                               max_size=2),
    max_leaves=3,
)
non_finite = st.sampled_from([math.nan, math.inf, -math.inf])


@st.composite
def broken(draw: st.DrawFn, spec: dict[str, Any], records: list[dict[str, Any]],
           values: st.SearchStrategy[Any]) -> list[Any]:
    """``records`` with a few random changes: a value replaced, a member added
    or removed, a key set, a record replaced (or nothing changed at all)."""
    batch: list[Any] = copy.deepcopy(records)
    names = [f["name"] for f in spec["features"]]
    for _ in range(draw(st.integers(0, 3))):
        index = draw(st.integers(0, len(batch) - 1))
        record = batch[index]
        if not isinstance(record, dict) or not isinstance(record.get("features"), dict):
            continue
        how = draw(st.sampled_from(["value", "label", "key", "drop", "extra", "extra-member",
                                    "record", "features", "drop-label"]))
        if how == "value":
            record["features"][draw(st.sampled_from(names))] = draw(values)
        elif how == "label":
            record["label"] = draw(values)
        elif how == "key":
            record["key"] = draw(values | st.text(min_size=1, max_size=3))
        elif how == "drop":
            record["features"].pop(draw(st.sampled_from(names)), None)
        elif how == "extra":
            record["features"][draw(st.sampled_from(["zz", *names]))] = draw(values)
        elif how == "extra-member":
            record[draw(st.sampled_from(["weight", "key", "label"]))] = draw(values)
        elif how == "record":
            batch[index] = draw(values)
        elif how == "features":
            record["features"] = draw(values)
        else:
            record.pop("label", None)
    return batch


def refused_as_none(load: Callable[[], Any]) -> Any:
    """What ``load()`` returns, or None when the schema refuses."""
    try:
        return load()
    except ValidationError:
        return None


def schema_load(rules: RecordRules, batch: list[Any]) -> list[dict[str, Any]] | None:
    return refused_as_none(lambda: rules.record_schema().load(batch, many=True))


def typed(value: Any) -> Any:
    """``value`` with the type of every scalar spelled out (1.0 == 1 otherwise)."""
    if isinstance(value, dict):
        return {k: typed(v) for k, v in value.items()}
    if isinstance(value, list):
        return [typed(v) for v in value]
    return (type(value).__name__, value)


@EXAMPLES
@given(data=st.data())
def test_the_fast_checker_loads_exactly_what_the_schema_loads(data: st.DataObject) -> None:
    spec = data.draw(model_spec(), label="spec")
    rules = rules_for(spec)
    valid = data.draw(valid_batch(spec), label="valid")
    batch = data.draw(broken(spec, valid, json_values | non_finite), label="batch")
    fast, slow = rules.fast_check(batch), schema_load(rules, batch)
    assert typed(fast) == typed(slow), (fast, slow)
    assert typed(rules.fast_check(valid)) == typed(schema_load(rules, valid))
    assert rules.fast_check(valid) is not None  # a valid batch takes the fast path


@st.composite
def broken_outcomes(draw: st.DrawFn, outcomes: list[dict[str, Any]],
                    values: st.SearchStrategy[Any]) -> list[Any]:
    """``outcomes`` with a few random changes (or none): a label or key
    replaced, a member dropped or added, an outcome replaced."""
    batch: list[Any] = copy.deepcopy(outcomes)
    for _ in range(draw(st.integers(0, 3))):
        index = draw(st.integers(0, len(batch) - 1))
        outcome = batch[index]
        if not isinstance(outcome, dict):
            continue
        how = draw(st.sampled_from(["label", "key", "drop", "extra", "outcome"]))
        if how in ("label", "key"):
            outcome[how] = draw(values)
        elif how == "drop":
            outcome.pop(draw(st.sampled_from(["key", "label"])), None)
        elif how == "extra":
            outcome[draw(st.sampled_from(["features", "weight"]))] = draw(values)
        else:
            batch[index] = draw(values)
    return batch


def schema_load_outcomes(rules: RecordRules, outcomes: list[Any]) -> list[Any] | None:
    return refused_as_none(
        lambda: list(rules.outcome_batch_schema().load({"outcomes": outcomes})["outcomes"]))


@EXAMPLES
@given(data=st.data())
def test_the_fast_outcome_checker_loads_exactly_what_the_schema_loads(
    data: st.DataObject
) -> None:
    spec = data.draw(model_spec(), label="spec")
    rules = rules_for(spec)
    valid = [{"key": f"case-{i}", "label": record["label"]}
             for i, record in enumerate(data.draw(valid_batch(spec), label="valid"))]
    batch = data.draw(broken_outcomes(valid, json_values | non_finite), label="batch")
    fast, slow = rules.fast_outcome_check(batch), schema_load_outcomes(rules, batch)
    assert typed(fast) == typed(slow), (fast, slow)
    assert rules.fast_outcome_check(valid) is not None  # a valid batch takes the fast path
    assert typed(rules.fast_outcome_check(valid)) == typed(schema_load_outcomes(rules, valid))


@EXAMPLES
@given(data=st.data())
def test_the_record_document_calls_valid_exactly_what_the_api_accepts(
    data: st.DataObject
) -> None:
    spec = data.draw(model_spec(), label="spec")
    rules = rules_for(spec)
    documents = model_documents("m", rules, **LIMITS)
    record_check = jsonschema.Draft202012Validator(documents["record"])
    outcome_check = jsonschema.Draft202012Validator(documents["outcome"])
    generic = jsonschema.Draft202012Validator(json_schema(
        RecordBatchSchema(), title="RecordBatch", description="the generic document"))
    valid = data.draw(valid_batch(spec), label="valid")
    batch = data.draw(broken(spec, valid, json_values), label="batch")
    for record in batch:
        accepted = schema_load(rules, [record]) is not None
        assert record_check.is_valid(record) == accepted, record
        if accepted:
            assert generic.is_valid({"records": [record]}), record
        if isinstance(record, dict):
            outcome = {k: v for k, v in record.items() if k != "features"}
            assert outcome_check.is_valid(outcome) == _outcome_accepted(rules, outcome), outcome


def _outcome_accepted(rules: RecordRules, outcome: Any) -> bool:
    try:
        rules.outcome_schema().load(outcome)
    except ValidationError:
        return False
    return True


@EXAMPLES
@given(data=st.data())
def test_the_prediction_document_calls_valid_exactly_what_the_api_accepts(
    data: st.DataObject
) -> None:
    spec = data.draw(model_spec(), label="spec")
    rules = rules_for(spec)
    check = jsonschema.Draft202012Validator(
        model_documents("m", rules, **LIMITS)["prediction_request"])
    valid = data.draw(valid_batch(spec), label="valid")
    batch = data.draw(broken(spec, valid, json_values), label="batch")
    body: dict[str, Any] = {"records": [{"features": r["features"]} if isinstance(r, dict)
                                        and "features" in r else r for r in batch]}
    options = data.draw(st.fixed_dictionaries({}, optional={
        "output": st.sampled_from(list(spec.get("classes") or [None])) | json_values,
        "explain": st.sampled_from(["gradient", "none", "shapley"]),
        "steps": st.integers(0, 2000), "noise": st.floats(0, 20) | json_values,
    }), label="options")
    body.update(options)
    readers = build_readers(rules)
    try:
        readers.read_body(body, MultiDict(), LIMITS["max_predictions"])
        accepted = True
    except InvalidInputError:
        accepted = False
    assert check.is_valid(body) == accepted, body


EDGE_SPECS = [
    {"task": "multiclass", "classes": [1, 2, 3], "features": [
        {"name": "bounded", "type": "numeric", "min": -1, "max": 1.5},
        {"name": "free", "type": "numeric"},
        {"name": "family", "type": "categorical", "levels": ["screw", "1", "true"]},
        {"name": "vfd", "type": "boolean"}]},
    {"task": "binary", "classes": [False, True], "features": [{"name": "vfd", "type": "boolean"}]},
    {"task": "regression", "features": [{"name": "free", "type": "numeric"}]},
]
LARGEST = 1.7976931348623157e308
EDGES: list[Any] = [
    0, 1, 2, 3, -1, 1.5, 1.5000000000000002, -1.0000000000000002, 2.0, 2.5, -0.0, True, False,
    None, "", "1", "2", "true", "screw", "Screw", "x" * 200, "x" * 201, "k\x00", "\x00",
    LARGEST, -LARGEST, int(LARGEST), -int(LARGEST), int(LARGEST) + 1, -int(LARGEST) - 1,
    2 ** 1024, -(2 ** 1024), 10 ** 400, [], [1], {}, {"a": 1},
]


def _edge_records(spec: dict[str, Any]) -> list[Any]:
    """A valid record, and that record with each member in turn set to each edge value."""
    valid = {"key": "k1", "features": {}, "label": (spec.get("classes") or [0.5])[0]}
    for feature in spec["features"]:
        valid["features"][feature["name"]] = {"numeric": 0.5, "boolean": True}.get(
            feature["type"], (feature.get("levels") or [""])[0])
    records: list[Any] = [valid, *EDGES]
    for edge in EDGES:
        records.append({**valid, "key": edge})
        records.append({**valid, "label": edge})
        records.extend({**valid, "features": {**valid["features"], name: edge}}
                       for name in valid["features"])
    return records


@pytest.mark.parametrize("spec", EDGE_SPECS, ids=[s["task"] for s in EDGE_SPECS])
def test_every_check_agrees_on_the_edges_of_each_rule(spec: dict[str, Any]) -> None:
    rules = rules_for(spec)
    record_check = jsonschema.Draft202012Validator(model_documents("m", rules, **LIMITS)["record"])
    for record in _edge_records(spec):
        slow = schema_load(rules, [record])
        assert typed(rules.fast_check([record])) == typed(slow), record
        assert record_check.is_valid(record) == (slow is not None), record


@pytest.mark.parametrize("task", ["binary", "multiclass"])
def test_integral_floats_name_integer_classes_in_every_check(task: str) -> None:
    """JSON has one number type (RFC 8259 section 6) and JSON Schema's enum
    compares numbers by value: 2.0 is the class 2 for the document, the
    schema and the fast checker alike."""
    classes = [1, 2] if task == "binary" else [1, 2, 3]
    rules = rules_for({"task": task, "classes": classes,
                       "features": [{"name": "x", "type": "boolean"}]})
    batch = [{"features": {"x": True}, "label": 2.0}]
    assert rules.fast_check(batch) == schema_load(rules, batch) == [
        {"features": {"x": True}, "label": 2}]
    assert type(rules.fast_check(batch)[0]["label"]) is int  # type: ignore[index]
    assert schema_load(rules, [{"features": {"x": True}, "label": 2.5}]) is None


def test_text_values_are_read_by_the_text_schema_with_the_same_rules() -> None:
    rules = rules_for({"task": "binary", "classes": ["ok", "failed"], "features": [
        {"name": "vibration_rms", "type": "numeric", "min": 0, "max": 100},
        {"name": "pump_family", "type": "categorical", "levels": ["centrifugal", "screw"]},
        {"name": "has_vfd", "type": "boolean"},
        {"name": "head_m", "type": "numeric"}]})
    schema = rules.feature_schema(text=True)
    row = {"vibration_rms": " 4.5", "pump_family": "screw", "has_vfd": "TRUE", "head_m": "-3"}
    assert schema.load(row) == {"vibration_rms": 4.5, "pump_family": "screw", "has_vfd": True,
                                "head_m": -3.0}
    with pytest.raises(ValidationError) as bad:
        schema.load({**row, "vibration_rms": "inf", "has_vfd": "yes", "pump_family": "Screw"})
    assert set(bad.value.messages) == {"vibration_rms", "has_vfd", "pump_family"}


def test_rules_are_compiled_once_per_spec_and_each_schema_built_once() -> None:
    spec = {"task": "regression", "features": [{"name": "x", "type": "numeric"}]}
    rules = rules_for(spec)
    assert rules is rules_for(dict(spec, name="other", training={"seed": 3}))
    assert rules.record_schema() is rules.record_schema()
    assert rules.record_schema(text=True) is not rules.record_schema()
    assert rules.fast_check is rules.fast_check
    assert rules_for({**spec, "task": "binary", "classes": [0, 1]}) is not rules


# Query values as clients spell them, biased towards the edges of the text rules.
TEXT_EDGES = ["0", "1", "-1", "1.5", "1.5000000000000002", " 2 ", "2.0", "1e3", "1E400", "-0",
              "0012", "1_000", "+1", "nan", "inf", "-Infinity", "true", "TRUE", " false", "yes",
              "", " ", "screw", "Screw", " screw", "x" * 201, "\x00", "\u0661", "1.8e308",
              "1.7976931348623157e308", "3", "2.5"]


@pytest.mark.parametrize("spec", EDGE_SPECS, ids=[s["task"] for s in EDGE_SPECS])
def test_a_query_reads_exactly_what_the_text_schema_loads(spec: dict[str, Any]) -> None:
    """GET predictions read the features through the text schema's own fields,
    one by one (``PredictionReaders.read_query``): the same values as the whole
    schema, refused exactly when it refuses, and a valid row never needs it."""
    rules = rules_for(spec)
    readers, schema = build_readers(rules), rules.feature_schema(text=True)
    valid = {f["name"]: {"numeric": "0.5", "boolean": "true"}.get(
        f["type"], (f.get("levels") or [""])[0]) for f in spec["features"]}
    rows = [valid, {**valid, "zz": "1"}, *({k: v for k, v in valid.items() if k != name}
                                          for name in valid)]
    rows += [{**valid, name: edge} for name in valid for edge in TEXT_EDGES]
    for row in rows:
        try:
            expected = schema.load(row)
        except ValidationError:
            expected = None
        try:
            got = readers.read_query(MultiDict(row))[0]
        except InvalidInputError:
            got = None
        assert typed(got) == typed(expected), row
        assert got is None or list(got) == list(expected or {}), row  # declared order
        assert (readers._query_features(row) is None) == (expected is None), row
