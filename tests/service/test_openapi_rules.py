"""/openapi.json states every rule that does not depend on a model, and the API
holds to it: what the document calls valid is accepted, what it calls invalid
is refused. Each case is checked both ways, against the document's own schema
(with the jsonschema library, a reference implementation of JSON Schema
2020-12, the dialect of OpenAPI 3.1) and against the API.

The requests an independent fuzz run found the document calling valid while
the API refused them are among the cases: ``classes: [null, null]``, a record
key of 201 characters, a retrain without a body."""

from __future__ import annotations

from typing import Any

import jsonschema
import pytest
from flask import Flask

from tests.service.helpers import ApiClient, create_model, model_spec, record


def validator(app: Flask, component: str) -> jsonschema.Draft202012Validator:
    document = app.extensions["keelson.openapi"]()
    assert document["openapi"] == "3.1.0"
    return jsonschema.Draft202012Validator(
        {"$ref": f"#/components/schemas/{component}", "components": document["components"]})


FEATURE = {"name": "flow", "type": "numeric"}
SPECS: list[tuple[str, dict[str, Any], bool]] = [
    ("classes null, null", {"classes": [None, None]}, False),
    ("classes of two types", {"classes": ["ok", 1]}, False),
    ("classes repeated", {"classes": ["ok", "ok"]}, False),
    ("a binary model with three classes", {"classes": ["a", "b", "c"]}, False),
    ("an empty class", {"classes": ["", "failed"]}, False),
    ("integer classes", {"classes": [0, 1]}, True),
    ("boolean classes", {"classes": [False, True]}, True),
    ("classes left to the default", {"classes": None}, True),
    ("a multiclass model without classes", {"task": "multiclass", "classes": None}, False),
    ("a multiclass model", {"task": "multiclass", "classes": ["low", "mid", "high"]}, True),
    ("a regression model with classes", {"task": "regression"}, False),
    ("a regression model", {"task": "regression", "classes": None}, True),
    ("a regression model choosing cross entropy",
     {"task": "regression", "classes": None, "loss": "cross_entropy"}, False),
    ("a binary model choosing squared error", {"loss": "squared_error"}, True),
    ("a categorical feature without levels",
     {"features": [{"name": "family", "type": "categorical"}]}, False),
    ("levels repeated",
     {"features": [{"name": "family", "type": "categorical", "levels": ["a", "a"]}]}, False),
    ("levels of a numeric feature",
     {"features": [{**FEATURE, "levels": ["a"]}]}, False),
    ("a unit for a boolean", {"features": [{"name": "vfd", "type": "boolean", "unit": "x"}]},
     False),
    ("a reserved feature name", {"features": [{**FEATURE, "name": "explain"}]}, False),
    ("a reserved target name", {"target": "version"}, False),
    ("bounds beyond a double", {"features": [{**FEATURE, "max": 2 ** 1024}]}, False),
    ("a numeric feature with bounds and a unit",
     {"features": [{**FEATURE, "min": 0, "max": 5, "unit": "m3/h"}]}, True),
    ("the old spelling of the decay exponent", {"training": {"power_t": 0.5}}, False),
    ("the old name of the decay schedule", {"training": {"lr_schedule": "invscaling"}}, False),
    ("the decay schedule", {"training": {"lr_schedule": "inverse_power",
                                          "decay_exponent": 0.25}}, True),
    ("a learning rate of zero", {"training": {"learning_rate": 0}}, False),
    ("an integral float for an integer", {"training": {"batch_size": 32.0}}, True),
]


@pytest.mark.parametrize(("case", "changes", "valid"), SPECS, ids=[c for c, _, _ in SPECS])
def test_a_model_spec_is_valid_for_the_document_exactly_when_the_api_takes_it(
    api: ApiClient, app: Flask, case: str, changes: dict[str, Any], valid: bool
) -> None:
    spec = model_spec(**changes)
    if spec.get("classes", "") is None:
        del spec["classes"]
    assert validator(app, "ModelSpec").is_valid(spec) == valid, case
    api.request("POST", "/v1/models", 201 if valid else 422, json_body=spec)


@pytest.mark.parametrize(("case", "key", "valid"), [
    ("a key of 200 characters", "k" * 200, True),
    ("a key of 201 characters", "k" * 201, False),
    ("an empty key", "", False),
    ("a key holding NUL", "a\x00b", False),
])
def test_a_record_key_is_valid_for_the_document_exactly_when_the_api_takes_it(
    api: ApiClient, app: Flask, case: str, key: str, valid: bool
) -> None:
    create_model(api)
    body = {"records": [record(1, key=key)]}
    assert validator(app, "RecordBatch").is_valid(body) == valid, case
    api.request("POST", "/v1/models/pump-risk/records", 201 if valid else 422, json_body=body)


def test_a_retrain_body_is_optional_as_the_document_says(api: ApiClient, app: Flask) -> None:
    operation = app.extensions["keelson.openapi"]()["paths"]["/v1/models/{name}/retrain"]
    assert operation["post"]["requestBody"]["required"] is False
    create_model(api)
    job = api.request("POST", "/v1/models/pump-risk/retrain", 202)["job"]
    assert job["status"] == "queued"


def test_the_batch_limits_of_the_settings_are_in_the_document(sqlite_url: str) -> None:
    from tests.service.conftest import build_app

    app = build_app(sqlite_url, KEELSON_MAX_RECORDS_PER_REQUEST=3, KEELSON_MAX_PREDICTION_BATCH=2)
    schemas = app.extensions["keelson.openapi"]()["components"]["schemas"]
    assert schemas["RecordBatch"]["properties"]["records"]["maxItems"] == 3
    assert schemas["PredictionRequest"]["properties"]["records"]["maxItems"] == 2
    api = ApiClient(app)
    create_model(api)
    api.request("POST", "/v1/models/pump-risk/records", 413,
                json_body={"records": [record(i) for i in range(4)]})
