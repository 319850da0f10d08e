"""Schemathesis over every operation of our own /openapi.json, with the admin
token and every check on, positive-data acceptance included: no answer is a
server error, every answer conforms to the document (status documented,
content type, body schema, headers), and a request the document calls valid
is never refused as malformed (400/422).

Each operation runs on SQLite and on PostgreSQL (each refuses different
things: SQLite integers beyond 64 bits, PostgreSQL NUL characters and
integers beyond a column's width). Each gets a fresh database holding one
model ("pump-risk") with an active version 1 and a queued retrain job 1. About
half the generated cases are pointed at them, so the fuzzing reaches the
views' real work and not only their 404s. What a record or a prediction may
contain depends on the model, so those cases carry requests generated from
the model's own schema (GET /v1/models/pump-risk/schema) by schemathesis
itself: JSON bodies, CSV bodies of the same records, and query strings.

The number of examples per operation is bounded: ``KEELSON_FUZZ_EXAMPLES``
(default 25, the CI run); the longer run is ``KEELSON_FUZZ_EXAMPLES=500``.

A second model ("pump-flow": a relu regression whose numeric fields declare
no bounds) takes a third of the aimed prediction cases, drawn from its own
schema with half of them carrying values up to the largest double: valid
requests whose output overflows must be refused as the client's (422), never
answered with a server error.
"""

from __future__ import annotations

import csv
import io
import json
import os
import zlib
from collections import Counter
from collections.abc import Iterator
from typing import Any

import pytest
import schemathesis
from flask import Flask
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from marshmallow import ValidationError
from schemathesis.specs.openapi.checks import positive_data_acceptance

import engine
from service.config import DEFAULTS
from service.usecases.model_limits import ModelLimits, size_errors
from service.web.app import create_app
from service.web.extensions import get_database, get_version_cache
from service.web.schemas.spec import ModelSpecSchema
from tests.service.helpers import ADMIN_TOKEN, ApiClient, create_model, record
from tests.service.predictions_factory import add_version, pump_rows, pump_rule, train_learner

EXAMPLES = int(os.environ.get("KEELSON_FUZZ_EXAMPLES", "25"))
OVERFLOW = "urn:keelson:problem:output-overflow"
MODEL = "pump-risk"
RECORDS_PER_CASE = 5  # the document allows thousands; a few keep each case quick
FLOW_MODEL = "pump-flow"
# What the aimed DELETE cases delete: never a model other cases aim at.
SPARE_MODEL = "pump-spare"
CONFIRM_REFUSED = {"query.confirm": ["Must be given once, equal to the model's name."]}
CASE_KEYS = [f"case-{i}" for i in range(12)]
FLOW_SPEC: dict[str, Any] = {
    "name": FLOW_MODEL, "task": "regression", "target": "flow_m3h", "activation": "relu",
    "hidden_layers": [16, 16],
    "features": [{"name": "speed_rpm", "type": "numeric"},
                 {"name": "head_m", "type": "numeric"},
                 {"name": "pump_family", "type": "categorical",
                  "levels": ["centrifugal", "screw"]}],
}
# Values for the unbounded fields, from ordinary to the largest finite double.
FLOW_VALUES = [1450.0, -3.5, 1e6, 1e154, 1e307, 1e308, -1e308, 1.7976931348623157e308]


@pytest.fixture
def fuzz_app(database_url: str) -> Iterator[Flask]:
    # TESTING off: an unexpected error is answered as a 500 problem, exactly as
    # in production, so the fuzzer sees it as the server error it would be.
    app = create_app({"KEELSON_DATABASE_URL": database_url,
                      "KEELSON_ADMIN_TOKEN": ADMIN_TOKEN})
    api = ApiClient(app)
    create_model(api)
    create_model(api, name=SPARE_MODEL)
    api.request("POST", f"/v1/models/{MODEL}/records", 201,
                json_body={"records": [record(i, key=f"k{i}") for i in range(20)]})
    spec = api.request("GET", f"/v1/models/{MODEL}", 200)
    learner = train_learner({**spec, **spec.get("spec", {})}, pump_rows(64), pump_rule, passes=1)
    add_version(app, MODEL, learner.to_bytes(), activate=True)
    get_version_cache(app).clear()
    # Scored cases the aimed outcome cases name (an unknown key is refused
    # with 422 on purpose: which keys exist is no schema's to state).
    api.request("POST", f"/v1/models/{MODEL}/predictions", 200, json_body={
        "explain": "none", "records": [{"key": key, "features": row} for key, row in zip(
            CASE_KEYS, pump_rows(len(CASE_KEYS), seed=3), strict=True)]})
    flow_spec = api.request("POST", "/v1/models", 201, json_body=FLOW_SPEC)
    flow = train_learner(flow_spec, flow_rows(64), flow_rule, passes=1)
    add_version(app, FLOW_MODEL, flow.to_bytes(), activate=True)
    get_version_cache(app).clear()  # as after the staleness bound: version 1 serves
    api.request("POST", f"/v1/models/{MODEL}/retrain", 202, json_body={"warm_start": False})
    app.extensions["fuzz.model"] = ModelRequests(spec, api.request(
        "GET", f"/v1/models/{MODEL}/schema", 200))
    app.extensions["fuzz.flow"] = ModelRequests(flow_spec, api.request(
        "GET", f"/v1/models/{FLOW_MODEL}/schema", 200))
    yield app
    get_database(app).engine.dispose()


def flow_rows(n: int) -> list[dict[str, Any]]:
    return [{"speed_rpm": 900.0 + 37.0 * i, "head_m": float(i % 40),
             "pump_family": "screw" if i % 2 else "centrifugal"} for i in range(n)]


def flow_rule(row: dict[str, Any]) -> float:
    """A made-up rating: flow rises with speed and falls with head."""
    return 0.05 * row["speed_rpm"] - 2.0 * row["head_m"]


def _extreme(features: dict[str, Any], seed: int) -> dict[str, Any]:
    """The flow model's features with its unbounded numbers pushed to the edge."""
    return {**features, "speed_rpm": FLOW_VALUES[seed % len(FLOW_VALUES)],
            "head_m": FLOW_VALUES[(seed // 8) % len(FLOW_VALUES)]}


def _inlined(document: dict[str, Any]) -> dict[str, Any]:
    """A document with its ``$defs`` substituted for their ``$ref`` (ours do not
    recurse), so it can sit inside another document."""
    definitions = document.get("$defs", {})

    def walk(value: Any) -> Any:
        if isinstance(value, list):
            return [walk(item) for item in value]
        if not isinstance(value, dict):
            return value
        if "$ref" in value:
            return walk(definitions[value["$ref"].removeprefix("#/$defs/")])
        return {k: walk(v) for k, v in value.items() if k not in ("$defs", "$schema")}

    inlined: dict[str, Any] = walk(document)
    return inlined


class ModelRequests:
    """Strategies for requests valid for the model, generated by schemathesis
    from an OpenAPI 3.1 document (whose schemas are JSON Schema 2020-12) made
    of the model's own documents."""

    def __init__(self, spec: dict[str, Any], documents: dict[str, Any]) -> None:
        self.spec = spec
        record = _inlined(documents["record"])
        prediction = _inlined(documents["prediction_request"])
        features = record["properties"]["features"]
        options = {k: v for k, v in prediction["properties"].items() if k != "records"}
        query = [{"in": "query", "name": name, "required": True, "schema": schema}
                 for name, schema in features["properties"].items()]
        query += [{"in": "query", "name": name, "schema": schema}
                  for name, schema in options.items()]
        batch = {"type": "object", "required": ["records"], "additionalProperties": False,
                 "properties": {"records": {"type": "array", "items": record, "minItems": 1,
                                            "maxItems": RECORDS_PER_CASE}}}
        prediction["properties"]["records"]["maxItems"] = RECORDS_PER_CASE
        outcome = _inlined(documents["outcome"])
        outcome["properties"]["key"] = {"enum": CASE_KEYS}
        outcomes = {"type": "object", "required": ["outcomes"], "additionalProperties": False,
                    "properties": {"outcomes": {"type": "array", "items": outcome,
                                                "minItems": 1, "maxItems": RECORDS_PER_CASE}}}
        answer = {"200": {"description": "OK"}}

        def body(schema: dict[str, Any]) -> dict[str, Any]:
            return {"required": True, "content": {"application/json": {"schema": schema}}}

        schema = schemathesis.openapi.from_dict({
            "openapi": "3.1.0", "info": {"title": MODEL, "version": "1"}, "paths": {
                "/records": {"post": {"requestBody": body(batch), "responses": answer}},
                "/outcomes": {"post": {"requestBody": body(outcomes), "responses": answer}},
                "/predictions": {"get": {"parameters": query, "responses": answer},
                                 "post": {"requestBody": body(prediction), "responses": answer}},
            }})
        self.records = schema["/records"]["POST"].as_strategy()
        self.outcomes = schema["/outcomes"]["POST"].as_strategy()
        self.query = schema["/predictions"]["GET"].as_strategy()
        self.predictions = schema["/predictions"]["POST"].as_strategy()

    def as_csv(self, records: list[dict[str, Any]]) -> str:
        """The same records as a CSV body (RFC 4180), values spelled as text."""
        names = [f["name"] for f in self.spec["features"]]
        out = io.StringIO()
        writer = csv.writer(out, lineterminator="\r\n")
        writer.writerow(["key", *names, self.spec["target"]])
        for item in records:
            writer.writerow([item.get("key", ""), *(_text(item["features"][n]) for n in names),
                             _text(item["label"])])
        return out.getvalue()

    @staticmethod
    def outcomes_csv(outcomes: list[dict[str, Any]]) -> str:
        out = io.StringIO()
        writer = csv.writer(out, lineterminator="\r\n")
        writer.writerow(["key", "label"])
        writer.writerows([item["key"], _text(item["label"])] for item in outcomes)
        return out.getvalue()


def _text(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    return repr(value) if isinstance(value, float) else str(value)


def _operations() -> list[tuple[str, str]]:
    """(method, path) of every operation in the document (no database needed)."""
    app = create_app({"KEELSON_DATABASE_URL": "sqlite://"})
    paths = app.extensions["keelson.openapi"]()["paths"]
    return [(method.upper(), path) for path, item in paths.items()
            for method in item if method in ("get", "post", "put", "patch", "delete")]


OPERATIONS = _operations()


def _states_only_in_words(spec: Any) -> bool:
    """Whether a model spec breaks one of the rules JSON Schema has no keyword
    for, which the document therefore states in words (the descriptions of
    ModelSpec and Feature): feature names are distinct, the target is none of
    them, a numeric feature's min is below its max, and the size limits on the
    spec's bytes, the network's parameters and the checkpoint spacing."""
    if not isinstance(spec, dict) or not isinstance(spec.get("features"), list):
        return False
    names = [f.get("name") for f in spec["features"] if isinstance(f, dict)]
    bounds = [(f["min"], f["max"]) for f in spec["features"]
              if isinstance(f, dict) and "min" in f and "max" in f]
    return (len(set(names)) != len(names) or spec.get("target") in names
            or any(not low < high for low, high in bounds) or _too_large(spec))


def _too_large(spec: dict[str, Any]) -> bool:
    limits = ModelLimits.from_config(DEFAULTS)
    if len(json.dumps(spec).encode()) > limits.spec_bytes:
        return True
    try:  # read as the API reads it (2.0 is the integer 2), then its defaults
        full = engine.apply_defaults(ModelSpecSchema().load(spec))
    except (ValidationError, engine.InvalidInputError):
        return False  # invalid for a reason the document states
    return bool(size_errors(full, limits))


def _aim(case: Any, data: st.DataObject, model: ModelRequests, flow: ModelRequests) -> None:
    """Point about half the cases at an existing model (the choice is a hash
    of the case, so a failure replays); records and predictions sent to it are
    drawn from its own schema. A third of the aimed prediction cases go to the
    unbounded flow model, half of those with values at the edge of a double."""
    path = case.operation.path
    if case.method.upper() == "POST" and path == "/v1/models":
        assume(not _states_only_in_words(case.body))
    # The body and query too: schemathesis draws the same few path values
    # again and again, so the path alone could leave an operation unaimed.
    seed = zlib.crc32(repr((case.path_parameters, case.query, case.body)).encode())
    if seed % 2 or not case.path_parameters:
        return
    predictions = path.endswith("/predictions")
    to_flow = predictions and seed % 3 == 0
    target = flow if to_flow else model
    if case.method.upper() == "DELETE":
        case.path_parameters["name"] = SPARE_MODEL
        case.query = {"confirm": SPARE_MODEL}
        return
    if "name" in case.path_parameters:
        case.path_parameters["name"] = FLOW_MODEL if to_flow else MODEL
        if "number" in case.path_parameters:
            case.path_parameters["number"] = 1
    if "job_id" in case.path_parameters:
        case.path_parameters["job_id"] = 1
    post = case.method.upper() == "POST"
    extreme = to_flow and (seed // 6) % 2 == 0
    if predictions and not post:
        case.query = data.draw(target.query, label="query").query
        if extreme:
            case.query.update({k: repr(v) for k, v in _extreme({}, seed // 12).items()})
    elif predictions:
        # The options travel in the body; the same option in the query too
        # must agree with it, a rule across two locations no schema can state.
        case.query = {}
        case.body = data.draw(target.predictions, label="prediction body").body
        if extreme:
            case.body["records"] = [{**item, "features": _extreme(item["features"], seed // 12)}
                                    for item in case.body["records"]]
    elif path.endswith("/sweeps"):
        # A record of the model's own schema (which fields and classes a model
        # has is no part of the generic document); the rest as drawn.
        drawn = data.draw(model.predictions, label="sweep record").body
        body = case.body if isinstance(case.body, dict) else {}
        case.body = {key: value for key, value in body.items() if key in ("points", "version")}
        case.body["features"] = drawn["records"][0]["features"]
    elif path.endswith("/records"):
        body = data.draw(model.records, label="records body").body
        case.body = model.as_csv(body["records"]) if case.media_type == "text/csv" else body
    elif (path.endswith("/records/forget") and isinstance(case.body, dict)
          and isinstance(case.body.get("keys"), list)):
        # Stored keys among the drawn ones, so the forget removes rows too.
        stored = data.draw(st.lists(st.sampled_from([f"k{i}" for i in range(20)]),
                                    max_size=5), label="stored keys")
        case.body = {**case.body, "keys": [*stored, *case.body["keys"]][:10_000]}
    elif path.endswith("/outcomes"):
        body = data.draw(model.outcomes, label="outcomes body").body
        case.body = (model.outcomes_csv(body["outcomes"]) if case.media_type == "text/csv"
                     else body)


def test_the_document_has_every_operation_of_the_contract() -> None:
    assert len(OPERATIONS) >= 15, OPERATIONS


@pytest.mark.parametrize(("method", "path"), OPERATIONS, ids=[f"{m} {p}" for m, p in OPERATIONS])
def test_every_operation_answers_within_the_document(fuzz_app: Flask, method: str,
                                                     path: str) -> None:
    operation = schemathesis.openapi.from_wsgi("/openapi.json", fuzz_app)[path][method]
    model: ModelRequests = fuzz_app.extensions["fuzz.model"]
    flow: ModelRequests = fuzz_app.extensions["fuzz.flow"]
    seen: list[int] = []

    @settings(max_examples=EXAMPLES, deadline=None, derandomize=True, database=None,
              suppress_health_check=list(HealthCheck))
    @given(case=operation.as_strategy(), data=st.data())
    def fuzz(case: Any, data: st.DataObject) -> None:
        _aim(case, data, model, flow)
        headers = {"Authorization": f"Bearer {ADMIN_TOKEN}"}
        response = case.call(headers=headers)
        # A valid input may drive the flow model's output past float64: the
        # documented 422 (output-overflow) refuses valid data on purpose.
        overflow = response.status_code == 422 and response.json().get("type") == OVERFLOW
        # A delete's confirm must equal the name in the path: a rule across
        # two parameters the document states in words, not in a schema.
        unconfirmed = (response.status_code == 422 and case.method.upper() == "DELETE"
                       and response.json().get("errors") == CONFIRM_REFUSED)
        case.validate_response(response, headers=headers, excluded_checks=[
            positive_data_acceptance] if overflow or unconfirmed else None)
        assert response.status_code < 500, (response.status_code, response.text)
        seen.append(response.status_code)

    fuzz()
    print(f"{method} {path}: {len(seen)} requests, statuses {dict(Counter(seen))}")
    # An operation without parameters or body has a single distinct request.
    assert seen and (len(seen) >= min(EXAMPLES, 5) or path in ("/healthz", "/readyz",
                                                                 "/openapi.json")), seen
    if method == "DELETE":  # the spare model was deleted, not only 404s and 422s
        assert 202 in seen, seen
    if path.endswith(("/records", "/predictions", "/outcomes", "/records/forget")):
        # The model's own requests were sent and accepted, not only 404s.
        assert set(seen) & {200, 201}, seen
