"""POST /v1/models/{name}/sweeps: individual conditional expectation curves
(Goldstein, Kapelner, Bleich and Pitkin 2015, "Peeking Inside the Black Box",
JCGS 24(1)): each point is the model's output for the record with one field
set to x. Checked against the service's own predictions of the same records
(our own contract; no outside source)."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from tests.service.helpers import ApiClient, create_model
from tests.service.predictions_factory import (
    add_version,
    pump_rows,
    pump_rule,
    stored_spec,
    train_learner,
)

ROW = {"vibration_rms": 41.5, "pump_family": "screw", "has_vfd": False}


@pytest.fixture
def served(any_api: ApiClient) -> ApiClient:
    create_model(any_api)
    learner = train_learner(stored_spec(any_api.app, "pump-risk"), pump_rows(200, seed=4),
                            pump_rule)
    add_version(any_api.app, "pump-risk", learner.to_bytes())
    return any_api


def predicted(api: ApiClient, rows: list[dict[str, Any]], output: str) -> list[float]:
    body = api.request("POST", "/v1/models/pump-risk/predictions", 200, json_body={
        "explain": "none", "records": [{"features": row} for row in rows]})
    return [result["result"]["probabilities"][output] for result in body["results"]]


def test_each_sweep_point_is_the_prediction_of_that_record(served: ApiClient) -> None:
    body = served.request("POST", "/v1/models/pump-risk/sweeps", 200, json_body={
        "features": ROW, "points": 11, "output": "failed"})
    assert body["model"] == "pump-risk" and body["version"] == 1
    assert body["output"] == "failed"
    (sweep,) = body["sweeps"]  # the one numeric field
    assert sweep["field"] == "vibration_rms" and sweep["current"] == 41.5
    # Its declared range, evenly spaced (PUMP_SPEC: min 0, max 100).
    assert sweep["x"] == pytest.approx(np.linspace(0, 100, 11).tolist(), abs=1e-12)
    direct = predicted(served, [{**ROW, "vibration_rms": x} for x in sweep["x"]], "failed")
    assert sweep["y"] == pytest.approx(direct, abs=1e-12)


def test_the_default_class_is_the_predicted_one(served: ApiClient) -> None:
    body = served.request("POST", "/v1/models/pump-risk/sweeps", 200,
                          json_body={"features": ROW})
    answer = served.request("POST", "/v1/models/pump-risk/predictions", 200, json_body={
        "explain": "none", "records": [{"features": ROW}]})
    assert body["output"] == answer["results"][0]["result"]["label"]
    assert len(body["sweeps"][0]["x"]) == 25


@pytest.mark.parametrize("body, field", [
    ({"features": ROW, "fields": ["pump_family"]}, "fields"),
    ({"features": ROW, "fields": ["vibration_rms", "vibration_rms"]}, "fields"),
    ({"features": ROW, "points": 1}, "points"),
    ({"features": ROW, "points": 10_000}, "points"),
    ({"features": ROW, "output": "leaking"}, "output"),
    ({"features": {**ROW, "vibration_rms": "high"}}, "features.vibration_rms"),
    ({"features": ROW, "colour": "red"}, "colour"),
])
def test_bad_requests_are_refused_naming_the_field(served: ApiClient, body: dict[str, Any],
                                                   field: str) -> None:
    answer = served.request("POST", "/v1/models/pump-risk/sweeps", 422, json_body=body)
    assert field in answer["errors"], answer


def test_a_model_without_an_active_version_is_a_conflict(any_api: ApiClient) -> None:
    create_model(any_api)
    any_api.request("POST", "/v1/models/pump-risk/sweeps", 409, json_body={"features": ROW})
