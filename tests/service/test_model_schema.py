"""GET /v1/models/{name}/schema: each model's own JSON Schema 2020-12 documents
(a record, a prediction request, an outcome), and the API holding to them.

Documents are checked with the jsonschema library (a reference implementation
of JSON Schema draft 2020-12): each is a valid schema of that dialect, and
what it calls valid the API accepts (the property tests in
tests/service/test_record_rules.py go wider, on random specs)."""

from __future__ import annotations

from typing import Any

import jsonschema
import pytest

from tests.service.helpers import ApiClient, create_model, record

SCHEMA = "/v1/models/pump-risk/schema"
DIALECT = "https://json-schema.org/draft/2020-12/schema"


def documents(api: ApiClient, token: str | None = None) -> dict[str, Any]:
    if token is None:
        body: dict[str, Any] = api.request("GET", SCHEMA, 200)
    else:
        body = api.request("GET", SCHEMA, 200, token=token)
    return body


def test_a_model_publishes_its_record_prediction_and_outcome_schemas(any_api: ApiClient) -> None:
    create_model(any_api)
    body = documents(any_api, any_api.token("predict"))
    assert set(body) == {"model", "record", "prediction_request", "outcome"}
    assert body["model"] == "pump-risk"
    for name in ("record", "prediction_request", "outcome"):
        assert body[name]["$schema"] == DIALECT
        jsonschema.Draft202012Validator.check_schema(body[name])
    features = body["record"]["$defs"]["Features"]
    assert features["properties"] == {
        "vibration_rms": {"type": "number", "minimum": 0, "maximum": 100},
        "pump_family": {"enum": ["centrifugal", "screw"]},
        "has_vfd": {"type": "boolean"},
    }
    assert features["additionalProperties"] is False
    assert sorted(features["required"]) == ["has_vfd", "pump_family", "vibration_rms"]
    assert body["record"]["properties"]["label"] == {"enum": ["ok", "failed"]}
    assert body["record"]["properties"]["key"]["maxLength"] == 200
    assert sorted(body["outcome"]["required"]) == ["key", "label"]
    assert body["prediction_request"]["properties"]["output"]["enum"] == ["ok", "failed"]
    assert body["prediction_request"]["properties"]["records"]["maxItems"] == 1000


def test_what_the_documents_call_valid_the_api_accepts_and_the_rest_it_refuses(
    api: ApiClient
) -> None:
    create_model(api)
    body = documents(api)
    record_check = jsonschema.Draft202012Validator(body["record"])
    prediction_check = jsonschema.Draft202012Validator(body["prediction_request"])
    good = record(1, key="st7-p2-2026-w14")
    bad = record(2, key="k" * 201, pump_family="vortex")
    assert record_check.is_valid(good)
    assert {e.json_path for e in record_check.iter_errors(bad)} == {
        "$.key", "$.features.pump_family"}
    api.request("POST", "/v1/models/pump-risk/records", 201, json_body={"records": [good]})
    refused = api.request("POST", "/v1/models/pump-risk/records", 422,
                          json_body={"records": [bad]})
    assert set(refused["errors"]) == {"records.0.key", "records.0.features.pump_family"}
    asked = {"records": [{"features": good["features"]}], "output": "failed"}
    assert prediction_check.is_valid(asked)
    assert not prediction_check.is_valid({**asked, "output": "broken"})
    assert not prediction_check.is_valid({**asked, "records": []})


def test_a_regression_model_states_a_number_label_and_no_output(api: ApiClient) -> None:
    create_model(api, task="regression", classes=None, name="flow-rate")
    body = api.request("GET", "/v1/models/flow-rate/schema", 200)
    label = body["record"]["properties"]["label"]
    assert label["type"] == "number"
    # Any finite double (IEEE 754 binary64), and nothing beyond.
    assert label["maximum"] == 1.7976931348623157e308 == -label["minimum"]
    assert "output" not in body["prediction_request"]["properties"]


@pytest.mark.parametrize("name", ["no-such-model", "Not_A_Name"])
def test_an_unknown_model_is_a_404_problem(api: ApiClient, name: str) -> None:
    body = api.request("GET", f"/v1/models/{name}/schema", 404)
    assert body["status"] == 404 and name in body["detail"]


def test_the_route_needs_the_predict_scope(api: ApiClient) -> None:
    create_model(api)
    api.request("GET", SCHEMA, 401, token=None)
    body = api.request("GET", SCHEMA, 403, token=api.token("ingest"))
    assert body["detail"] == "This token lacks the 'predict' scope."


def test_the_openapi_document_describes_the_route(api: ApiClient) -> None:
    document = api.request("GET", "/openapi.json", 200, token=None)
    operation = document["paths"]["/v1/models/{name}/schema"]["get"]
    assert operation["x-scope"] == "predict"
    assert operation["responses"]["200"]["content"]["application/json"]["schema"] == {
        "$ref": "#/components/schemas/ModelDocuments"}
    shape = document["components"]["schemas"]["ModelDocuments"]
    assert sorted(shape["required"]) == ["model", "outcome", "prediction_request", "record"]
