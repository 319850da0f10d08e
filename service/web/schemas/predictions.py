"""Prediction requests: the optional parameters, and each model's request readers.

The optional parameters (``explain``, ``version``, ``output``, ``steps`` and the
SmoothGrad knobs) are one marshmallow schema in two spellings: JSON values in a
POST body, text in a query string. Feature values are checked by the model's
compiled rules (``service.web.schemas.rules``), so a record and a prediction
accept exactly the same values. Everything a model needs is built once per
model (see ``prediction_readers``) and reused by every request.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from marshmallow import RAISE, Schema, ValidationError, fields, validate
from werkzeug.datastructures import MultiDict

import engine
from service.errors import InvalidInputError, TooLargeError
from service.usecases.predictions import (
    CASE_KEY,
    DEFAULT_EXPLAIN,
    DEFAULT_NOISE,
    DEFAULT_STEPS,
    EXPLAIN_METHODS,
    MAX_NOISE,
    MAX_SAMPLES,
    MAX_STEPS,
    MIN_STEPS,
    OPTION_NAMES,
    QUERY_NAMES,
    PredictionOptions,
)
from service.web.schemas.fields import (
    Choice,
    ChoiceFromText,
    IntegerFromText,
    NumberFromText,
    StrictInteger,
    StrictNumber,
)
from service.web.schemas.rules import RecordRules, key_field, rules_of

# What every model's records share, for the generic document.
_ANY_MODEL = RecordRules.any_model()

MAX_SEED = 2**32 - 1


def options_fields(text: bool) -> dict[str, fields.Field[Any]]:
    """The optional parameters, as JSON values (``text=False``) or as text."""
    integer = IntegerFromText if text else StrictInteger
    number = NumberFromText if text else StrictNumber
    return {
        "explain": fields.String(
            validate=validate.OneOf(EXPLAIN_METHODS),
            metadata={"description": f"Attribution method; default {DEFAULT_EXPLAIN}. "
                      "`none`: no explanation (`explanation` is null)."},
        ),
        # versions.number is a 32-bit INTEGER column: beyond it PostgreSQL
        # refuses the parameter (it was a 500).
        "version": integer(minimum=1, maximum=2**31 - 1, metadata={
            "description": "A version number; default the active version."}),
        "output": fields.Raw(metadata={
            "description": "The class whose probability is explained; default the "
            "predicted class. Booleans are spelled true/false."}),
        "steps": integer(minimum=MIN_STEPS, maximum=MAX_STEPS, metadata={
            "description": f"Integrated gradients: trapezoid intervals; default {DEFAULT_STEPS}."}),
        "samples": integer(minimum=1, maximum=MAX_SAMPLES, metadata={
            "description": f"SmoothGrad: noisy samples; default {engine.DEFAULT_SAMPLES}. "
            "Shapley: random orders of the fields for an estimate with standard errors (at least "
            "2), required above the exact limit (KEELSON_SHAPLEY_EXACT_FIELDS fields, 422 "
            "without); below it the values are exact and samples is not used."}),
        "noise": number(minimum=0, maximum=MAX_NOISE, as_float=True, metadata={
            "description": "SmoothGrad: noise standard deviation in standardised units; "
            f"default {DEFAULT_NOISE}."}),
        "seed": integer(minimum=0, maximum=MAX_SEED, metadata={
            "description": "SmoothGrad: seed of the noise; sampled Shapley values: seed of "
            "the orders; default 0."}),
    }


PredictionQuerySchema = Schema.from_dict(options_fields(text=True), name="PredictionQuery")
PredictionOptionsSchema = Schema.from_dict(options_fields(text=False), name="PredictionOptions")


class PredictionRecordSchema(Schema):
    key = key_field()  # a case key: the score is kept until its outcome arrives
    features = _ANY_MODEL.features_field()


class PredictionRequestSchema(PredictionOptionsSchema):  # type: ignore[misc,valid-type]
    """The POST body: records to score, and the optional parameters (also
    accepted as query parameters; given in both places they must agree)."""

    records = fields.List(fields.Nested(PredictionRecordSchema), required=True,
                          validate=validate.Length(min=1))  # an empty batch is refused


@dataclass(frozen=True, slots=True)
class PredictionReaders:
    """One model's request readers: built from its spec once, used per request."""

    query_options: Schema
    body_options: Schema
    query_features: Schema
    body_features: Schema
    output_text: ChoiceFromText | None
    output_json: Choice | None
    # The query names that are options, and the case key's, for this model: a
    # model stored before a name was reserved keeps its feature of that name
    # (GET /v1/models/{name} lists it under ``reserved_name_clashes``).
    option_names: frozenset[str] = frozenset(OPTION_NAMES)
    key_name: str | None = CASE_KEY

    def read_query(self, args: MultiDict[str, str]
                   ) -> tuple[dict[str, Any], PredictionOptions, str | None]:
        """GET: features, options and the case key (None: unkeyed) from the
        query string; errors keyed by parameter."""
        errors: dict[str, list[str]] = {}
        features: dict[str, Any] = {}
        options: dict[str, Any] = {}
        case_key = None
        for key, values in args.lists():
            if len(values) > 1:
                errors[key] = ["Given more than once."]
            if key == self.key_name:
                case_key = self._key(values[0], key, errors)
            else:
                (options if key in self.option_names else features)[key] = values[0]
        try:
            loaded = self.query_features.load(features)
        except ValidationError as exc:
            merge_messages(errors, exc.messages, "")
            loaded = {}
        chosen = self._options(options, text=True, errors=errors)
        if errors:
            raise InvalidInputError("The query has invalid parameters.", errors=errors)
        return loaded, PredictionOptions(**chosen), case_key

    @staticmethod
    def _key(value: Any, path: str, errors: dict[str, list[str]]) -> str | None:
        try:
            loaded: str = _KEY.deserialize(value)
            return loaded
        except ValidationError as exc:
            merge_messages(errors, exc.messages, path)
            return None

    def read_body(
        self, body: Any, args: MultiDict[str, str], max_records: int
    ) -> tuple[list[dict[str, Any]], PredictionOptions, list[str | None] | None]:
        """POST: records from the JSON body, options from the body and the
        query, and each record's case key (None when no record has one)."""
        if not isinstance(body, dict):
            raise InvalidInputError("The body must be an object.",
                                    errors={"body": ['Expected {"records": [...]}.']})
        records = body.get("records")
        if isinstance(records, list) and len(records) > max_records:
            raise TooLargeError(
                f"At most {max_records} records per prediction request.",
                errors={"records": [f"{len(records)} records; at most {max_records}."]},
            )
        errors: dict[str, list[str]] = {}
        in_body = {key: value for key, value in body.items() if key != "records"}
        in_query: dict[str, Any] = {}
        for key, values in args.lists():
            if key not in OPTION_NAMES:
                errors[key] = ["Unknown query parameter; features go in the body."]
            elif len(values) > 1:
                errors[key] = ["Given more than once."]
            else:
                in_query[key] = values[0]
        keys: list[str | None] = []
        rows = self._records(records, errors, keys)
        from_body = self._options(in_body, text=False, errors=errors)
        from_query = self._options(in_query, text=True, errors=errors)
        for key in from_body.keys() & from_query.keys():
            if from_body[key] != from_query[key]:
                errors[key] = ["Given in the body and the query with different values."]
        if errors:
            raise InvalidInputError("The request is invalid.", errors=errors)
        return rows, PredictionOptions(**from_query, **{
            key: value for key, value in from_body.items() if key not in from_query}), \
            (keys if any(key is not None for key in keys) else None)

    def _records(self, records: Any, errors: dict[str, list[str]],
                 keys: list[str | None]) -> list[dict[str, Any]]:
        if records is None:
            errors["records"] = ["Missing data for required field."]
            return []
        if not isinstance(records, list):
            errors["records"] = ["Not a valid list."]
            return []
        if not records:
            errors["records"] = ["At least one record is needed."]
            return []
        rows = []
        for index, item in enumerate(records):
            path = f"records.{index}"
            if not isinstance(item, dict):
                errors[path] = ['Expected {"features": {...}}.']
                continue
            for key in item:
                if key != "features" and key != CASE_KEY:
                    errors[f"{path}.{key}"] = ["Unknown field."]
            keys.append(self._key(item[CASE_KEY], f"{path}.{CASE_KEY}", errors)
                        if CASE_KEY in item else None)
            if "features" not in item:
                errors[f"{path}.features"] = ["Missing data for required field."]
                continue
            if not isinstance(item["features"], dict):
                errors[f"{path}.features"] = ["Not a valid mapping."]
                continue
            try:
                rows.append(self.body_features.load(item["features"]))
            except ValidationError as exc:
                merge_messages(errors, exc.messages, f"{path}.features")
        return rows

    def _options(self, given: dict[str, Any], *, text: bool,
                 errors: dict[str, list[str]]) -> dict[str, Any]:
        """Each given option through its field of the options schema.

        Field by field rather than ``schema.load``: a request names one or two
        options, and a whole-schema pass per request costs more than the rest
        of the parsing. Every bad option is reported, and the good ones are kept
        so a conflict between body and query can be named too.
        """
        if not given:
            return {}  # the common request: every default
        declared = (self.query_options if text else self.body_options).fields
        loaded: dict[str, Any] = {}
        for key, value in given.items():
            if key == "output":  # checked against the model's own classes
                loaded[key] = self._output(value, text, errors)
                continue
            field = declared.get(key)
            if field is None:
                errors[key] = ["Unknown field."]
                continue
            try:
                loaded[key] = field.deserialize(value)
            except ValidationError as exc:
                merge_messages(errors, exc.messages, key)
        return loaded

    def _output(self, value: Any, text: bool, errors: dict[str, list[str]]) -> Any:
        field = self.output_text if text else self.output_json
        if field is None:
            errors["output"] = ["A regression model has one output; omit output."]
            return None
        try:
            return field.deserialize(value)
        except ValidationError as exc:
            errors["output"] = list(exc.messages) if isinstance(exc.messages, list) else [
                str(exc.messages)]
            return None


def merge_messages(errors: dict[str, list[str]], messages: Any, prefix: str) -> None:
    """marshmallow's (possibly nested) messages as flat field paths under ``prefix``."""
    if isinstance(messages, Mapping):
        for key, value in messages.items():
            path = prefix if key == "_schema" else (f"{prefix}.{key}" if prefix else str(key))
            merge_messages(errors, value, path)
    elif isinstance(messages, list) and all(isinstance(m, str) for m in messages):
        errors.setdefault(prefix or "body", []).extend(messages)
    else:
        errors.setdefault(prefix or "body", []).append(str(messages))


_KEY = key_field(required=True)


def build_readers(rules: RecordRules) -> PredictionReaders:
    """Everything needed to read a prediction request for a model with these rules."""
    classes = rules.classes
    clashes = reserved_name_clashes(rules)
    return PredictionReaders(
        option_names=frozenset(OPTION_NAMES) - clashes,
        key_name=None if CASE_KEY in clashes else CASE_KEY,
        query_options=PredictionQuerySchema(unknown=RAISE),
        body_options=PredictionOptionsSchema(unknown=RAISE),
        query_features=rules.feature_schema(text=True),
        body_features=rules.feature_schema(),
        output_text=None if classes is None else ChoiceFromText(classes, what="class"),
        output_json=None if classes is None else Choice(classes, what="class"),
    )


def reserved_name_clashes(rules: RecordRules) -> frozenset[str]:
    """The declared features named like a query parameter of GET predictions
    (only a model stored before the name was reserved has any)."""
    return frozenset(rule.name for rule in rules.features or ()
                     if rule.name in QUERY_NAMES)


def prediction_readers(entry: Any) -> PredictionReaders:
    """The readers of a cached model entry, built on first use and kept with it."""
    readers: PredictionReaders | None = entry.derived.get("prediction_readers")
    if readers is None:
        readers = build_readers(rules_of(entry))
        entry.derived["prediction_readers"] = readers
    return readers


# -- answers (they document what the views send; tests hold the two together) --
class PredictionResultSchema(Schema):
    label = fields.Raw(metadata={"description": "Classification: the predicted class."})
    probabilities = fields.Dict(keys=fields.String(), values=fields.Float(), metadata={
        "description": "Classification: class -> probability (booleans spelled false/true)."})
    value = fields.Float(metadata={"description": "Regression: the predicted value."})


class ExplanationSchema(Schema):
    method = fields.String(required=True, validate=validate.OneOf(EXPLAIN_METHODS[:-1]))
    output = fields.Raw(required=True, allow_none=True, metadata={
        "description": "The explained class; null for regression."})
    attributions = fields.Dict(keys=fields.String(), values=fields.Float(), required=True,
                               metadata={"description": "Declared feature -> attribution, "
                                         "in output units."})
    completeness_gap = fields.Float(required=True, allow_none=True, metadata={
        "description": "Integrated gradients and Shapley values: "
        "|sum(attributions) - (value - baseline_value)|."})
    standard_errors = fields.Dict(
        keys=fields.String(), values=fields.Float(), allow_none=True, metadata={
            "description": "Shapley values only: declared feature -> standard error of its "
            "sampled estimate; null when the values are exact."})
    value = fields.Float(required=True, metadata={"description": "f(input) explained."})
    baseline_value = fields.Float(required=True, metadata={"description": "f(baseline)."})


class ScoredRecordSchema(Schema):
    key = fields.String(metadata={"description": "Only for a keyed record: its case key."})
    rescored = fields.Boolean(metadata={
        "description": "Only for a keyed record: true when this key was scored before with "
        "the same features (the case keeps its first score)."})
    result = fields.Nested(PredictionResultSchema, required=True)
    explanation = fields.Nested(ExplanationSchema, required=True, allow_none=True, metadata={
        "description": "null when explain=none."})


def baseline_field() -> fields.Dict:
    """The reference input every explanation of an answer is measured from,
    answered once beside the records (the same for all of them)."""
    return fields.Dict(keys=fields.String(), values=fields.Raw(), required=True,
                       allow_none=True, metadata={
        "description": "The reference input of every explanation: the mean of the inputs "
        "the version learned from, numbers in raw units, booleans as the share of true, "
        "categorical fields as {level: share}; null when explain=none."})


class PredictionSchema(ScoredRecordSchema):
    model = fields.String(required=True)
    version = fields.Integer(required=True)
    baseline = baseline_field()


class PredictionBatchSchema(Schema):
    model = fields.String(required=True)
    version = fields.Integer(required=True)
    baseline = baseline_field()
    results = fields.List(fields.Nested(ScoredRecordSchema), required=True)
