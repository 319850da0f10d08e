"""A valid request whose output overflows is the client's input, not a server
failure: 422 naming the cause and the fields that drove it.

A relu network is unbounded: an input of 1e308 (valid JSON, within a field
that declares no bounds) times a weight overflows float64 to infinity, and the
next layer's inf - inf is NaN (IEEE 754 arithmetic; common practice, no
source). Neither is JSON (RFC 8259 section 6), so no answer can carry it.
"""

from __future__ import annotations

from typing import Any

import pytest

from tests.service.helpers import ADMIN_TOKEN, ApiClient
from tests.service.predictions_factory import add_version, numeric_rows, train_learner

PATH = "/v1/models/flow/predictions"
OVERFLOW = "urn:keelson:problem:output-overflow"


def numeric_spec(task: str) -> dict[str, Any]:
    spec: dict[str, Any] = {
        "name": "flow", "task": task, "target": "y", "activation": "relu",
        "hidden_layers": [16, 16],
        "features": [{"name": "a", "type": "numeric"}, {"name": "b", "type": "numeric"},
                     {"name": "family", "type": "categorical", "levels": ["screw", "lobe"]}],
    }
    if task == "binary":
        spec["classes"] = ["ok", "failed"]
    return spec


def rule(task: str) -> Any:
    def label(row: dict[str, Any]) -> Any:
        value = 2.0 * row["a"] + 3.0 * row["b"]  # 2 x 1e308 is beyond float64
        return ("failed" if value > 10 else "ok") if task == "binary" else value
    return label


def serve(api: ApiClient, task: str) -> ApiClient:
    created = api.request("POST", "/v1/models", 201, json_body=numeric_spec(task))
    rows = [{**row, "family": "screw"} for row in numeric_rows(200)]
    add_version(api.app, "flow", train_learner(created, rows, rule(task)).to_bytes())
    return api


@pytest.fixture
def served(api: ApiClient) -> ApiClient:
    return serve(api, "regression")


@pytest.mark.parametrize("explain", ["none", "gradient", "integrated_gradients", "smoothgrad",
                                     "shapley"])
def test_a_get_whose_output_overflows_answers_422_naming_the_fields(
    served: ApiClient, explain: str,
) -> None:
    body = served.request(
        "GET", f"{PATH}?a=1.7e308&b=2.5&family=screw&explain={explain}", 422)
    assert body["type"] == OVERFLOW
    assert "overflow" in body["detail"] and "a = 1.7e+308" in body["detail"]
    assert list(body["errors"]) == ["a"]


def test_a_batch_names_the_record_that_overflows(served: ApiClient) -> None:
    records = [{"features": {"a": 1.0, "b": 2.0, "family": "lobe"}},
               {"features": {"a": 3.0, "b": -1e308, "family": "screw"}}]
    body = served.request("POST", PATH, 422, json_body={"records": records,
                                                        "explain": "gradient"})
    assert body["type"] == OVERFLOW and "records.1" in body["detail"]
    assert list(body["errors"]) == ["records.1.features.b"]


def test_large_inputs_that_do_not_overflow_are_answered(served: ApiClient) -> None:
    body = served.request("GET", f"{PATH}?a=1e6&b=-1e6&family=lobe&explain=gradient", 200)
    assert body["explanation"]["method"] == "gradient"


@pytest.mark.parametrize("values", ["a=1e308&b=1e308", "a=1e308&b=-1e308", "a=-1e308&b=1e308",
                                    "a=-1.7e308&b=-1.7e308"])
def test_a_classifier_at_extreme_inputs_answers_finite_numbers_or_422(
    api: ApiClient, values: str,
) -> None:
    """A logistic output saturates rather than overflows, but inf - inf inside
    the network is NaN all the same: either answer is fine, a 500 is not."""
    serve(api, "binary")
    for explain in ("none", "gradient", "integrated_gradients", "smoothgrad", "shapley"):
        response = api.client.get(f"{PATH}?{values}&family=lobe&explain={explain}",
                                  headers={"Authorization": f"Bearer {ADMIN_TOKEN}"})
        assert response.status_code in (200, 422), response.get_data(True)
        if response.status_code == 422:
            assert response.json is not None and response.json["type"] == OVERFLOW
