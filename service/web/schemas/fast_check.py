"""The fast checkers of JSON records and outcomes, compiled from a model's ``RecordRules``.

Ingest's hot path: a batch of 1,000 valid records through marshmallow costs
tens of milliseconds; this loads the same batch in plain Python at a small
fraction of that. It returns exactly what ``rules.record_schema().load(records,
many=True)`` returns, or None at the first value it does not accept; the caller
then runs the schema, which names every bad field. The outcome checker does the same
for ``rules.outcome_batch_schema()``. Each pair is generated from the same
rules, and tests/service/test_record_rules.py holds them equal on random
specs and broken records and outcomes.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any

from service.web.schemas.fields import LARGEST_INT, MISSING, choose

if TYPE_CHECKING:
    from service.web.schemas.rules import FieldRule

Check = Callable[[Sequence[Any]], "list[dict[str, Any]] | None"]
# How each value is checked: a number within bounds; a level (a choice among
# strings: one set lookup); any other choice (by type and value); a boolean.
NUMBER, LEVEL, CHOICE, BOOLEAN = 0, 1, 2, 3
_CHOICE_TYPES = (str, int, bool, float)  # JSON scalars; a list or an object is never a choice
_RECORD_KEYS = frozenset({"key", "features", "label"})
_OUTCOME_KEYS = frozenset({"key", "label"})


def _number(value: Any, low: float | None, high: float | None) -> float | None:
    kind = type(value)
    if kind is int:
        if not -LARGEST_INT <= value <= LARGEST_INT:
            return None
        value = float(value)
    elif kind is not float or not math.isfinite(value):
        return None
    if (low is not None and value < low) or (high is not None and value > high):
        return None
    return float(value)


def _plan(rule: FieldRule) -> tuple[str, int, Any, Any]:
    """(name, kind, a, b): a number's bounds, a level's set, a choice's lookup."""
    if rule.kind == "number":
        return rule.name, NUMBER, rule.minimum, rule.maximum
    if rule.kind == "boolean":
        return rule.name, BOOLEAN, None, None
    if all(type(c) is str for c in rule.choices):
        return rule.name, LEVEL, frozenset(rule.choices), None
    return rule.name, CHOICE, {(type(c), c): c for c in rule.choices}, None


def _choice(lookup: dict[tuple[type, Any], Any], value: Any) -> Any:
    if type(value) not in _CHOICE_TYPES:
        return MISSING
    found = lookup.get((type(value), value), MISSING)
    return choose(lookup, value) if found is MISSING else found


def compile_fast_check(features: Sequence[FieldRule], label_rule: FieldRule,
                       max_key: int) -> Check:
    """The checker of these rules: loaded records, or None when any is not valid."""
    plan = [_plan(rule) for rule in features]
    width = len(plan)
    _, label_kind, label_a, label_b = _plan(label_rule)

    def check(records: Sequence[Any]) -> list[dict[str, Any]] | None:
        loaded = []
        for record in records:
            if type(record) is not dict or not record.keys() <= _RECORD_KEYS:
                return None
            row = record.get("features")
            if type(row) is not dict or len(row) != width or "label" not in record:
                return None
            features: dict[str, Any] = {}
            for name, kind, a, b in plan:
                if name not in row:
                    return None
                value = row[name]
                if kind == NUMBER:
                    value = _number(value, a, b)
                    if value is None:
                        return None
                elif kind == LEVEL:
                    if type(value) is not str or value not in a:
                        return None
                elif kind == CHOICE:
                    value = _choice(a, value)
                    if value is MISSING:
                        return None
                elif value is not True and value is not False:
                    return None
                features[name] = value
            label = _label(label_kind, label_a, label_b, record["label"])
            if label is MISSING:
                return None
            out: dict[str, Any] = {"features": features, "label": label}
            if "key" in record:
                key = record["key"]
                if not _key_ok(key, max_key):
                    return None
                out["key"] = key
            loaded.append(out)
        return loaded

    return check


def compile_fast_outcome_check(label_rule: FieldRule, max_key: int) -> Check:
    """The checker of outcomes (``{"key", "label"}``, the label by the records'
    rule): what ``rules.outcome_batch_schema().load`` returns as its
    ``outcomes``, or None at the first item it does not accept."""
    _, label_kind, label_a, label_b = _plan(label_rule)

    def check(outcomes: Sequence[Any]) -> list[dict[str, Any]] | None:
        loaded = []
        for outcome in outcomes:
            if type(outcome) is not dict or outcome.keys() != _OUTCOME_KEYS:
                return None
            key = outcome["key"]
            label = _label(label_kind, label_a, label_b, outcome["label"])
            if label is MISSING or not _key_ok(key, max_key):
                return None
            loaded.append({"key": key, "label": label})
        return loaded

    return check


def _label(kind: int, a: Any, b: Any, label: Any) -> Any:
    """The label loaded by its rule, or MISSING."""
    if kind == NUMBER:
        number = _number(label, a, b)
        return MISSING if number is None else number
    if kind == LEVEL:
        return label if type(label) is str and label in a else MISSING
    return _choice(a, label)


def _key_ok(key: Any, max_key: int) -> bool:
    return type(key) is str and 1 <= len(key) <= max_key and "\x00" not in key
