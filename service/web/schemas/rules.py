"""What a record of one model may contain: the field rules of its spec, compiled once.

A spec compiles into a ``RecordRules``: one ``FieldRule`` per feature, one for
the label, and the key rule every model shares. Everything that checks or
documents a record is generated from those rules, so none can disagree with
another:

- marshmallow schemas, for JSON values and for text (query strings, CSV cells):
  they name every bad field (``records.3.features.x``);
- the fast checker (``service.web.schemas.fast_check``), which loads an
  all-valid batch at a fraction of marshmallow's cost and hands anything else
  to the schema for its messages;
- JSON Schema 2020-12 documents of a record, a prediction request and an
  outcome (``service.web.schemas.json_schema``), published per model.

The rules of a spec are built once and cached (per spec here; the API keeps
them with each model in the version cache, see ``rules_of``).
"""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property, lru_cache
from typing import Any

from marshmallow import RAISE, Schema, ValidationError, fields, validate

from service.errors import InvalidInputError, TooLargeError
from service.web.problems import flatten_messages
from service.web.schemas.fast_check import Check, compile_fast_check, compile_fast_outcome_check
from service.web.schemas.fields import (
    AnyValue,
    BooleanFromText,
    Choice,
    ChoiceFromText,
    NumberFromText,
    StrictBoolean,
    StrictNumber,
    WholeMatch,
)
from service.web.schemas.spec import FIELD_NAME_PATTERN, MAX_VALUE_LENGTH

MAX_KEY_LENGTH = 200
CACHE_SIZE = 256
NO_RECORDS = "At least one record is required."
NOT_A_BATCH = 'Expected {"records": [...]}.'
NO_OUTCOMES = "At least one outcome is required."


@dataclass(frozen=True, slots=True)
class FieldRule:
    """What one value may be: a number within bounds, one of some choices, or a boolean."""

    name: str
    kind: str  # "number" | "choice" | "boolean"; "any" before the model is known
    minimum: float | None = None
    maximum: float | None = None
    choices: tuple[Any, ...] = ()
    what: str = "value"  # how a choice is named in messages: "level", "class"

    def field(self, *, text: bool = False, **kwargs: Any) -> fields.Field[Any]:
        """This rule as a marshmallow field (required unless ``kwargs`` say otherwise)."""
        kwargs.setdefault("required", True)
        if self.kind == "number":
            number = NumberFromText if text else StrictNumber
            return number(minimum=self.minimum, maximum=self.maximum, as_float=True, **kwargs)
        if self.kind == "choice":
            choice = ChoiceFromText if text else Choice
            return choice(self.choices, what=self.what, **kwargs)
        if self.kind == "any":
            return AnyValue(max_length=MAX_VALUE_LENGTH, **kwargs)
        return (BooleanFromText if text else StrictBoolean)(**kwargs)


def key_field(**kwargs: Any) -> fields.String:
    """The key rule: a record's (and an outcome's) case key."""
    return fields.String(validate=[
        validate.Length(min=1, max=MAX_KEY_LENGTH),
        # PostgreSQL text cannot hold U+0000 (it was a 500 there); refused on
        # every backend so both store the same keys.
        WholeMatch(r"[^\x00]*", error="A key cannot contain U+0000 (NUL)."),
    ], metadata={"description": f"The case key, unique per model: 1 to {MAX_KEY_LENGTH} "
                 "characters, no U+0000."}, **kwargs)


def _spec_rules(spec: Mapping[str, Any]) -> tuple[tuple[FieldRule, ...], FieldRule]:
    features = []
    for feature in spec["features"]:
        kind = feature["type"]
        if kind == "numeric":
            rule = FieldRule(feature["name"], "number", feature.get("min"), feature.get("max"))
        elif kind == "categorical":
            rule = FieldRule(feature["name"], "choice", choices=tuple(feature["levels"]),
                             what="level")
        else:
            rule = FieldRule(feature["name"], "boolean")
        features.append(rule)
    classes = spec.get("classes")
    if spec["task"] == "regression" or classes is None:
        label = FieldRule("label", "number")
    else:
        label = FieldRule("label", "choice", choices=tuple(classes), what="class")
    return tuple(features), label


@dataclass(eq=False)
class RecordRules:
    """The compiled rules of one spec and everything generated from them.

    ``features`` None stands for a model not known yet: any declared name, any
    value some model may declare (the OpenAPI document's generic record).
    """

    features: tuple[FieldRule, ...] | None
    label: FieldRule
    _schemas: dict[tuple[str, bool], Schema] = field(default_factory=dict, repr=False)

    @classmethod
    def of_spec(cls, spec: Mapping[str, Any]) -> RecordRules:
        features, label = _spec_rules(spec)
        return cls(features, label)

    @classmethod
    def any_model(cls) -> RecordRules:
        """The rules every model shares: what the generic document states."""
        return cls(None, FieldRule("label", "any"))

    @property
    def classes(self) -> tuple[Any, ...] | None:
        """The model's classes, or None for a regression model."""
        return self.label.choices if self.label.kind == "choice" else None

    # -- marshmallow ----------------------------------------------------------
    def _schema(self, what: str, text: bool, build: Callable[[], Schema]) -> Schema:
        schema = self._schemas.get((what, text))
        if schema is None:
            schema = self._schemas[(what, text)] = build()
        return schema

    def feature_schema(self, *, text: bool = False) -> Schema:
        """One row of feature values (``{name: value}``): every feature, nothing else."""
        def build() -> Schema:
            assert self.features is not None, "a model not known yet has no declared features"
            declared = {rule.name: rule.field(text=text) for rule in self.features}
            return Schema.from_dict(declared, name="Features")(unknown=RAISE)
        return self._schema("features", text, build)

    def features_field(self, *, text: bool = False) -> fields.Field[Any]:
        """The ``features`` member of a record or a prediction."""
        if self.features is not None:
            return fields.Nested(self.feature_schema(text=text), required=True)
        return fields.Dict(
            keys=fields.String(validate=WholeMatch(FIELD_NAME_PATTERN)),
            values=self.label.field(), required=True,
            metadata={"description": "One value per declared feature of the model, nothing "
                      "else; GET /v1/models/{name}/schema states each one."})

    def record_schema(self, *, text: bool = False) -> Schema:
        """One labelled record: ``{"key"?, "features", "label"}``."""
        def build() -> Schema:
            return Schema.from_dict({
                "key": key_field(),
                "features": self.features_field(text=text),
                "label": self.label.field(text=text),
            }, name="Record")(unknown=RAISE)
        return self._schema("record", text, build)

    def batch_schema(self) -> Schema:
        """The JSON body of an ingest request: ``{"records": [record, ...]}``."""
        def build() -> Schema:
            return batch_schema_class(fields.Nested(self.record_schema()))(unknown=RAISE)
        return self._schema("batch", False, build)

    def outcome_schema(self) -> Schema:
        """What happened to a case: ``{"key", "label"}`` by the record's rules."""
        def build() -> Schema:
            return Schema.from_dict({"key": key_field(required=True),
                                     "label": self.label.field()}, name="Outcome")(unknown=RAISE)
        return self._schema("outcome", False, build)

    def outcome_batch_schema(self, *, text: bool = False) -> Schema:
        """The body of POST .../outcomes: ``{"outcomes": [outcome, ...]}``; with
        ``text`` the same of CSV cells (the label in its text form)."""
        def build() -> Schema:
            outcome = Schema.from_dict({"key": key_field(required=True),
                                        "label": self.label.field(text=text)},
                                       name="OutcomeText" if text else "Outcome")
            return Schema.from_dict({"outcomes": fields.List(
                fields.Nested(outcome(unknown=RAISE)), required=True,
                validate=validate.Length(min=1, error=NO_OUTCOMES))},
                name="OutcomeBatch")(unknown=RAISE)
        return self._schema("outcome_batch", text, build)

    def load_outcomes(self, body: Any, *, max_outcomes: int, text: bool = False
                      ) -> list[dict[str, Any]]:
        """The outcomes of a body ``{"outcomes": [...]}``, loaded (labels as the
        records' are). TooLargeError beyond ``max_outcomes``, before any is
        looked at; InvalidInputError naming every bad field otherwise."""
        outcomes = body.get("outcomes") if type(body) is dict else None
        if type(outcomes) is list and len(outcomes) > max_outcomes:
            raise TooLargeError(
                f"At most {max_outcomes} outcomes per request; got {len(outcomes)}.",
                errors={"outcomes": [f"{len(outcomes)} outcomes; at most {max_outcomes}."]})
        if not text and type(outcomes) is list and outcomes and len(body) == 1:
            # {"outcomes": [...]} and nothing else: the fast checker, else the schema
            fast = self.fast_outcome_check(outcomes)
            if fast is not None:
                return fast
        try:
            loaded: dict[str, Any] = self.outcome_batch_schema(text=text).load(body)
        except ValidationError as exc:
            raise InvalidInputError("The outcomes are invalid; none was stored.",
                                    errors=flatten_messages(exc.messages)) from exc
        return list(loaded["outcomes"])

    # -- checking -------------------------------------------------------------
    @cached_property
    def fast_check(self) -> Check:
        """The fast all-valid checker of JSON records (None when any is not valid)."""
        assert self.features is not None, "records are checked against a model's rules"
        return compile_fast_check(self.features, self.label, MAX_KEY_LENGTH)

    @cached_property
    def fast_outcome_check(self) -> Check:
        """The fast all-valid checker of JSON outcomes (None when any is not valid)."""
        return compile_fast_outcome_check(self.label, MAX_KEY_LENGTH)

    def load_records(self, records: Sequence[Any], *, text: bool = False
                     ) -> list[dict[str, Any]]:
        """``records`` loaded (numbers as floats, choices as declared), or
        InvalidInputError naming every bad field as ``records.<i>.<field>``."""
        if not text:
            fast = self.fast_check(records)
            if fast is not None:
                return fast
        try:
            loaded: list[dict[str, Any]] = self.record_schema(text=text).load(records, many=True)
        except ValidationError as exc:
            raise InvalidInputError("Some records are invalid; none was stored.",
                                    errors=flatten_messages(exc.messages, "records")) from exc
        return loaded

    def load_batch(self, body: Any, *, max_records: int | None = None) -> list[dict[str, Any]]:
        """The records of an ingest body ``{"records": [...]}``, loaded.

        TooLargeError beyond ``max_records`` (before any record is looked at);
        InvalidInputError naming every bad field otherwise.
        """
        records = body.get("records") if type(body) is dict else None
        if type(records) is list and max_records is not None and len(records) > max_records:
            raise TooLargeError(f"At most {max_records} records per request; got {len(records)}.")
        if type(records) is list and records and len(body) == 1:
            fast = self.fast_check(records)
            if fast is not None:
                return fast
        try:
            loaded: dict[str, Any] = self.batch_schema().load(body)
        except ValidationError as exc:
            errors = flatten_messages(exc.messages)
            detail = ("Some records are invalid; none was stored."
                      if all(path.startswith("records.") for path in errors)
                      else "The body is invalid; nothing was stored.")
            raise InvalidInputError(detail, errors=errors) from exc
        return list(loaded["records"])


def batch_schema_class(record: fields.Field[Any], *, name: str = "RecordBatch") -> type[Schema]:
    """``{"records": [record, ...]}``: at least one record, nothing else."""
    schema_class = Schema.from_dict({
        "records": fields.List(record, required=True,
                               validate=validate.Length(min=1, error=NO_RECORDS)),
    }, name=name)
    schema_class.error_messages = {**Schema.error_messages, "type": NOT_A_BATCH}
    return schema_class


def rules_for(spec: Mapping[str, Any]) -> RecordRules:
    """The rules of ``spec``, compiled once per distinct set of field rules."""
    return _rules(_cache_key(spec))


def rules_of(entry: Any) -> RecordRules:
    """The rules of a model entry of the version cache, kept with the entry."""
    rules: RecordRules | None = entry.derived.get("record_rules")
    if rules is None:
        rules = entry.derived["record_rules"] = rules_for(entry.spec)
    return rules


def _cache_key(spec: Mapping[str, Any]) -> str:
    # Only what shapes the accepted values; names, training settings and the
    # like do not change which records are valid.
    return json.dumps(
        {"task": spec["task"], "classes": spec.get("classes"), "features": spec["features"]},
        sort_keys=True,
    )


@lru_cache(maxsize=CACHE_SIZE)
def _rules(key: str) -> RecordRules:
    return RecordRules.of_spec(json.loads(key))
