"""Schemas generated from a model's spec: its features, and its records.

Built once per spec and cached, so a request pays only for validation. The
same generated schema serves JSON bodies and, with ``text=True``, values that
arrive as text (query strings, CSV cells): one set of rules either way.
Every field is required and non-null; unknown fields are rejected.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from functools import lru_cache
from typing import Any

from marshmallow import RAISE, Schema, fields, validate

from service.schemas.fields import (
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


def label_field(spec: Mapping[str, Any], *, text: bool = False) -> fields.Field:
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
    declared: dict[str, fields.Field] = {}
    for feature in spec["features"]:
        kind = feature["type"]
        if kind == "numeric":
            number = NumberFromText if text else StrictNumber
            field: fields.Field = number(
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
    declared: dict[str, fields.Field] = {
        "key": fields.String(validate=validate.Length(min=1, max=MAX_KEY_LENGTH)),
        "features": fields.Nested(_feature_schema(key, text), required=True),
        "label": label_field(spec, text=text),
    }
    schema_class = Schema.from_dict(declared, name="Record")
    return schema_class(unknown=RAISE)
