"""Schemathesis over every operation of our own /openapi.json, with the admin
token: no answer is a server error, and every answer conforms to the document
(status documented, content type, body schema, headers).

Each operation runs on SQLite and on PostgreSQL (each refuses different
things: SQLite integers beyond 64 bits, PostgreSQL NUL characters and
integers beyond a column's width). Each gets a fresh database holding one
model ("pump-risk") with an active version 1 and a queued retrain job 1, and
a share of the generated cases is pointed at them with valid features and
records, so the fuzzing reaches the views' real work and not only their 404s.
The number of examples per operation is bounded: ``KEELSON_FUZZ_EXAMPLES``
(default 25, the CI run); the longer run is ``KEELSON_FUZZ_EXAMPLES=500``.

A second model ("pump-flow": a relu regression whose numeric fields declare
no bounds) takes a share of the aimed cases, with values drawn up to the
largest double: valid requests whose output overflows must be refused as the
client's (422), never answered with a server error.
"""

from __future__ import annotations

import os
import zlib
from collections import Counter
from collections.abc import Iterator
from typing import Any

import pytest
import schemathesis
from flask import Flask
from hypothesis import HealthCheck, given, settings

from service.web.app import create_app
from service.web.extensions import get_database
from tests.service.helpers import ADMIN_TOKEN, ApiClient, create_model, record
from tests.service.predictions_factory import add_version, pump_rows, pump_rule, train_learner

EXAMPLES = int(os.environ.get("KEELSON_FUZZ_EXAMPLES", "25"))
MODEL = "pump-risk"
FLOW_MODEL = "pump-flow"
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
# "Schema-valid data is accepted" cannot hold for this API: each model checks
# records against its own feature spec, and a spec's cross-field rules (a
# multiclass task needs classes, a categorical feature its levels) are beyond
# what an OpenAPI 3.0 schema can say. Every other check runs, the
# rejection of schema-invalid data included.
NOT_EXPRESSIBLE = [schemathesis.checks.positive_data_acceptance]
VALID_QUERY = {"vibration_rms": "12.5", "pump_family": "screw", "has_vfd": "true"}
VALID_FEATURES = {"vibration_rms": 12.5, "pump_family": "screw", "has_vfd": True}


@pytest.fixture
def fuzz_app(database_url: str) -> Iterator[Flask]:
    # TESTING off: an unexpected error is answered as a 500 problem, exactly as
    # in production, so the fuzzer sees it as the server error it would be.
    app = create_app({"KEELSON_DATABASE_URL": database_url,
                      "KEELSON_ADMIN_TOKEN": ADMIN_TOKEN})
    api = ApiClient(app)
    create_model(api)
    api.request("POST", f"/v1/models/{MODEL}/records", 201,
                json_body={"records": [record(i, key=f"k{i}") for i in range(20)]})
    spec = api.request("GET", f"/v1/models/{MODEL}", 200)
    learner = train_learner({**spec, **spec.get("spec", {})}, pump_rows(64), pump_rule, passes=1)
    add_version(app, MODEL, learner.to_bytes(), activate=True)
    flow_spec = api.request("POST", "/v1/models", 201, json_body=FLOW_SPEC)
    flow = train_learner(flow_spec, flow_rows(64), flow_rule, passes=1)
    add_version(app, FLOW_MODEL, flow.to_bytes(), activate=True)
    api.request("POST", f"/v1/models/{MODEL}/retrain", 202, json_body={"warm_start": False})
    yield app
    get_database(app).engine.dispose()


def flow_rows(n: int) -> list[dict[str, Any]]:
    return [{"speed_rpm": 900.0 + 37.0 * i, "head_m": float(i % 40),
             "pump_family": "screw" if i % 2 else "centrifugal"} for i in range(n)]


def flow_rule(row: dict[str, Any]) -> float:
    """A made-up rating: flow rises with speed and falls with head."""
    return 0.05 * row["speed_rpm"] - 2.0 * row["head_m"]


def _flow_features(seed: int) -> dict[str, Any]:
    """Valid features for the flow model, extreme values included."""
    return {"speed_rpm": FLOW_VALUES[seed % len(FLOW_VALUES)],
            "head_m": FLOW_VALUES[(seed // 8) % len(FLOW_VALUES)], "pump_family": "screw"}


def _operations() -> list[tuple[str, str]]:
    """(method, path) of every operation in the document (no database needed)."""
    app = create_app({"KEELSON_DATABASE_URL": "sqlite://"})
    paths = app.extensions["keelson.openapi"]()["paths"]
    return [(method.upper(), path) for path, item in paths.items()
            for method in item if method in ("get", "post", "put", "patch", "delete")]


OPERATIONS = _operations()


def _aim(case: Any) -> None:
    """Point about half the cases at the existing model, with valid features for
    predictions and valid records for ingest (the other fields as generated);
    the choice is a hash of the case, so a failure replays."""
    seed = zlib.crc32(repr(case.path_parameters).encode())
    if seed % 2:
        return
    predictions = case.operation.path.endswith("/predictions")
    # A third of the aimed prediction cases go to the unbounded flow model.
    flow = predictions and seed % 3 == 0
    if case.path_parameters and "name" in case.path_parameters:
        case.path_parameters["name"] = FLOW_MODEL if flow else MODEL
        if "number" in case.path_parameters:
            case.path_parameters["number"] = 1
    if case.path_parameters and "job_id" in case.path_parameters:
        case.path_parameters["job_id"] = 1
    post = case.method.upper() == "POST"
    features = _flow_features(seed // 6) if flow else VALID_FEATURES
    if predictions and not post:
        query = {name: repr(value) if isinstance(value, float) else value
                 for name, value in features.items()} if flow else VALID_QUERY
        case.query = {**(case.query or {}), **query}
        case.query.pop("features", None)
        if flow:
            case.query.pop("output", None)  # a regression has one output
    elif predictions and isinstance(case.body, dict):
        case.body = {**case.body, "records": [{"features": features}]}
        if flow:
            case.body.pop("output", None)
    elif case.operation.path.endswith("/records") and isinstance(case.body, dict):
        case.body = {"records": [record(i) for i in range(3)]}


def test_the_document_has_every_operation_of_the_contract() -> None:
    assert len(OPERATIONS) >= 14, OPERATIONS


@pytest.mark.parametrize(("method", "path"), OPERATIONS, ids=[f"{m} {p}" for m, p in OPERATIONS])
def test_every_operation_answers_within_the_document(fuzz_app: Flask, method: str,
                                                     path: str) -> None:
    operation = schemathesis.openapi.from_wsgi("/openapi.json", fuzz_app)[path][method]
    seen: list[int] = []

    @settings(max_examples=EXAMPLES, deadline=None, derandomize=True, database=None,
              suppress_health_check=list(HealthCheck))
    @given(case=operation.as_strategy())
    def fuzz(case: Any) -> None:
        _aim(case)
        response = case.call_and_validate(headers={"Authorization": f"Bearer {ADMIN_TOKEN}"},
                                          excluded_checks=NOT_EXPRESSIBLE)
        assert response.status_code < 500, (response.status_code, response.text)
        seen.append(response.status_code)

    fuzz()
    print(f"{method} {path}: {len(seen)} requests, statuses {dict(Counter(seen))}")
    # An operation without parameters or body has a single distinct request.
    assert seen and (len(seen) >= min(EXAMPLES, 5) or path in ("/healthz", "/readyz",
                                                                 "/openapi.json")), seen
