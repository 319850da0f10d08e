"""Schemas generated from a model's spec: its features, and its records.

Built once per spec and cached, so a request pays only for validation. The
same generated schema serves JSON bodies and, with ``text=True``, values that
arrive as text (query strings, CSV cells): one set of rules either way.
Every field is required and non-null; unknown fields are rejected.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Mapping, Sequence
from functools import lru_cache
from typing import Any

from marshmallow import RAISE, Schema, fields, validate

from service.web.schemas.fields import (
    BooleanFromText,
    Choice,
    ChoiceFromText,
    NumberFromText,
    StrictBoolean,
    StrictNumber,
)

MAX_KEY_LENGTH = 200
CACHE_SIZE = 256


def _cache_key(spec: Mapping[str, Any]) -> str:
    # Only what shapes the accepted values; names, training settings and the
    # like do not change which records are valid.
    return json.dumps(
        {"task": spec["task"], "classes": spec.get("classes"), "features": spec["features"]},
        sort_keys=True,
    )


def feature_schema(spec: Mapping[str, Any], *, text: bool = False) -> Schema:
    """A schema for one row of feature values of this model (``{name: value}``).

    Numbers load as floats within the declared bounds; categorical values must
    be a declared level; booleans are true or false. With ``text=True`` values
    may also be spelled as text (``"4.1"``, ``"true"``).
    """
    return _feature_schema(_cache_key(spec), text)


def record_schema(spec: Mapping[str, Any], *, text: bool = False) -> Schema:
    """A schema for one labelled record: ``{"key"?, "features", "label"}``."""
    return _record_schema(_cache_key(spec), text)


def label_field(spec: Mapping[str, Any], *, text: bool = False) -> fields.Field[Any]:
    """The field a label is checked with: a class of the model, or a number."""
    classes = spec.get("classes")
    if spec["task"] == "regression" or classes is None:
        number = NumberFromText if text else StrictNumber
        return number(required=True, as_float=True)
    choice = ChoiceFromText if text else Choice
    return choice(classes, what="class", required=True)


@lru_cache(maxsize=CACHE_SIZE)
def _feature_schema(key: str, text: bool) -> Schema:
    spec = json.loads(key)
    declared: dict[str, fields.Field[Any]] = {}
    for feature in spec["features"]:
        kind = feature["type"]
        if kind == "numeric":
            number = NumberFromText if text else StrictNumber
            field: fields.Field[Any] = number(
                minimum=feature.get("min"), maximum=feature.get("max"),
                as_float=True, required=True,
            )
        elif kind == "categorical":
            choice = ChoiceFromText if text else Choice
            field = choice(feature["levels"], what="level", required=True)
        else:
            field = (BooleanFromText if text else StrictBoolean)(required=True)
        declared[feature["name"]] = field
    schema_class = Schema.from_dict(declared, name="Features")
    return schema_class(unknown=RAISE)


@lru_cache(maxsize=CACHE_SIZE)
def _record_schema(key: str, text: bool) -> Schema:
    spec = json.loads(key)
    declared: dict[str, fields.Field[Any]] = {
        "key": fields.String(validate=[
            validate.Length(min=1, max=MAX_KEY_LENGTH),
            # PostgreSQL text cannot hold U+0000 (it was a 500 there); refused
            # on every backend so both store the same keys.
            validate.Regexp(r"^[^\x00]*$", error="A key cannot contain U+0000 (NUL)."),
        ]),
        "features": fields.Nested(_feature_schema(key, text), required=True),
        "label": label_field(spec, text=text),
    }
    schema_class = Schema.from_dict(declared, name="Record")
    return schema_class(unknown=RAISE)


Loader = Callable[[Sequence[Any]], "list[dict[str, Any]] | None"]


def fast_record_loader(spec: Mapping[str, Any]) -> Loader:
    """A plain-Python twin of ``record_schema(spec).load(records, many=True)``
    for the common case where every record is valid.

    It returns the same loaded records, or None at the first thing it does not
    accept; the caller then runs the marshmallow schema, which names every bad
    field. It accepts a strict subset of what the schema accepts (the tests hold
    the two together), at a small fraction of the cost per record.
    """
    return _fast_record_loader(_cache_key(spec))


@lru_cache(maxsize=CACHE_SIZE)
def _fast_record_loader(key: str) -> Loader:
    spec = json.loads(key)
    plan = []
    for feature in spec["features"]:
        kind = feature["type"]
        if kind == "numeric":
            plan.append((feature["name"], 0, feature.get("min"), feature.get("max")))
        elif kind == "categorical":
            plan.append((feature["name"], 1, frozenset(feature["levels"]), None))
        else:
            plan.append((feature["name"], 2, None, None))
    width = len(plan)
    regression = spec["task"] == "regression" or spec.get("classes") is None
    classes = {} if regression else {(type(c), c): c for c in spec["classes"]}
    allowed = {"key", "features", "label"}

    def number(value: Any, low: Any, high: Any) -> float | None:
        kind = type(value)
        if kind is int:
            try:
                value = float(value)
            except OverflowError:
                return None
        elif kind is not float:
            return None
        if not math.isfinite(value):
            return None
        if (low is not None and value < low) or (high is not None and value > high):
            return None
        return float(value)

    def load(records: Sequence[Any]) -> list[dict[str, Any]] | None:
        loaded = []
        for record in records:
            if type(record) is not dict or not record.keys() <= allowed:
                return None
            row = record.get("features")
            if type(row) is not dict or len(row) != width or "label" not in record:
                return None
            features: dict[str, Any] = {}
            for name, kind, a, b in plan:
                if name not in row:
                    return None
                value = row[name]
                if kind == 0:
                    value = number(value, a, b)
                    if value is None:
                        return None
                elif kind == 1:
                    if type(value) is not str or value not in a:
                        return None
                elif value is not True and value is not False:
                    return None
                features[name] = value
            label = record["label"]
            if regression:
                label = number(label, None, None)
                if label is None:
                    return None
            else:
                if type(label) not in _CLASS_TYPES:  # also keeps lists out of the lookup
                    return None
                label = classes.get((type(label), label), _MISSING)
                if label is _MISSING:
                    return None
            out: dict[str, Any] = {"features": features, "label": label}
            if "key" in record:
                record_key = record["key"]
                if (type(record_key) is not str or not 1 <= len(record_key) <= MAX_KEY_LENGTH
                        or "\x00" in record_key):
                    return None
                out["key"] = record_key
            loaded.append(out)
        return loaded

    return load


_MISSING = object()
_CLASS_TYPES = (str, int, bool)
