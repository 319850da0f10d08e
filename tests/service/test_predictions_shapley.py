"""GET and POST predictions with explain=shapley (docs/http-api.md, "Predictions"):
exact values up to KEELSON_SHAPLEY_EXACT_FIELDS fields, above that 422 unless
samples are given, then estimates with standard errors; the budget counts
their rows. On SQLite and PostgreSQL.

The expected bodies come from the same stored snapshot through the engine
(tests/engine/test_shapley.py checks the values themselves against Shapley
1953 and Strumbelj & Kononenko 2014).
"""

from __future__ import annotations

from typing import Any

import pytest

import engine
from engine.shapley import MAX_EXACT_FIELDS
from service.config import setting
from service.usecases.prediction_limits import rows_per_record
from service.usecases.predictions import answer_bytes
from service.web.schemas.predictions import PredictionBatchSchema, PredictionSchema
from tests.service.helpers import ApiClient, create_model
from tests.service.predictions_factory import pump_rows
from tests.service.test_predictions_api import PATH, PUMP, PUMP_QUERY, pump_version


def shapley_body(learner: Any, features: dict[str, Any], **kwargs: Any) -> dict[str, Any]:
    e = learner.explain(features, method="shapley", **kwargs)
    return {"method": "shapley", "output": e.output, "attributions": e.attributions,
            "completeness_gap": e.completeness_gap, "value": e.value,
            "baseline_value": e.baseline_value, "standard_errors": e.standard_errors}


def test_get_and_post_answer_exact_shapley_values(any_api: ApiClient) -> None:
    create_model(any_api)
    learner = pump_version(any_api)
    body = any_api.request("GET", f"{PATH}?{PUMP_QUERY}&explain=shapley", 200)
    explanation = body["explanation"]
    assert explanation == shapley_body(learner, PUMP, output=body["result"]["label"])
    assert explanation["standard_errors"] is None  # exact
    # Efficiency (Shapley 1953), over HTTP: the values add up to the served change.
    assert abs(sum(explanation["attributions"].values())
               - (explanation["value"] - explanation["baseline_value"])) <= 1e-12
    assert PredictionSchema().validate(body) == {}

    rows = pump_rows(4, seed=5)
    posted = any_api.request("POST", f"{PATH}?output=failed", 200, json_body={
        "records": [{"features": row} for row in rows], "explain": "shapley"})
    assert [r["explanation"] for r in posted["results"]] == [
        shapley_body(learner, row, output="failed") for row in rows]
    assert PredictionBatchSchema().validate(posted) == {}


def test_more_fields_than_the_exact_limit_answer_422_unless_samples_are_given(
        any_api: ApiClient) -> None:
    create_model(any_api)
    learner = pump_version(any_api)
    any_api.app.config["KEELSON_SHAPLEY_EXACT_FIELDS"] = 2  # the pump model has 3 fields
    refused = any_api.request("GET", f"{PATH}?{PUMP_QUERY}&explain=shapley", 422)
    assert "samples" in refused["errors"]
    assert "12" not in refused["detail"] and "2 fields" in refused["detail"]
    for samples in (1,):  # one order gives no standard error
        refused = any_api.request(
            "GET", f"{PATH}?{PUMP_QUERY}&explain=shapley&samples={samples}", 422)
        assert "samples" in refused["errors"]

    body = any_api.request("GET", f"{PATH}?{PUMP_QUERY}&explain=shapley&samples=64&seed=9",
                           200)
    explanation = body["explanation"]
    assert explanation == shapley_body(learner, PUMP, output=body["result"]["label"],
                                       samples=64, seed=9, exact_fields=2)
    assert set(explanation["standard_errors"]) == set(PUMP)
    assert PredictionSchema().validate(body) == {}
    posted = any_api.request("POST", PATH, 200, json_body={
        "records": [{"features": PUMP}], "explain": "shapley", "samples": 64, "seed": 9})
    assert posted["results"][0]["explanation"] == explanation
    # The budget's estimate of the answer's size holds the standard errors too.
    assert len(any_api.last.data) <= answer_bytes(learner, 1, True, True)


def test_the_budget_counts_every_coalition_or_every_sampled_row(api: ApiClient) -> None:
    assert rows_per_record("shapley", 64, None, fields=7, exact_fields=12) \
        > 2 ** 7 > rows_per_record("shapley", 64, None, fields=7, exact_fields=12) - 16
    assert rows_per_record("shapley", 64, 100, fields=20, exact_fields=12) >= 100 * 21
    create_model(api)
    pump_version(api)
    api.app.config["KEELSON_PREDICTION_BUDGET"] = 10_000_000
    # Exact: 2^3 rows a record pass where 1,000 samples x 4 rows do not.
    api.request("GET", f"{PATH}?{PUMP_QUERY}&explain=shapley", 200)
    api.app.config["KEELSON_SHAPLEY_EXACT_FIELDS"] = 2
    refused = api.request("GET", f"{PATH}?{PUMP_QUERY}&explain=shapley&samples=1000", 422)
    assert refused["type"] == "urn:keelson:problem:over-budget"


def test_the_setting_defaults_to_the_engines_limit_and_stops_at_its_largest() -> None:
    exact = setting("KEELSON_SHAPLEY_EXACT_FIELDS")
    assert exact.default == engine.SHAPLEY_EXACT_FIELDS
    assert exact.parse(str(MAX_EXACT_FIELDS)) == MAX_EXACT_FIELDS
    for bad in ("0", str(MAX_EXACT_FIELDS + 1), "12.0"):
        with pytest.raises(ValueError):
            exact.parse(bad)
