"""Explanations served over HTTP agree with predictions served over HTTP.

Nothing here looks inside the service: every number comes from a served answer
(GET /v1/models/{name}/predictions through the WSGI interface), so the checks
hold the whole path (query parsing, version cache, encoding, engine, JSON)
against two outside facts:

- a partial derivative equals the central finite difference
  (f(x + h) - f(x - h)) / 2h up to O(h^2): numerical differentiation, common
  practice, no source;
- integrated gradients are complete: the attributions sum to f(x) - f(baseline)
  (Sundararajan, Taly & Yan, "Axiomatic Attribution for Deep Networks",
  ICML 2017, the completeness axiom), and the trapezoid estimate's gap shrinks
  as the number of steps grows (same paper, section 3).

Models are all-numeric, so the returned baseline is itself a servable input.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from typing import Any
from urllib.parse import urlencode

import numpy as np
import pytest
from flask import Flask

from service.web.app import create_app
from service.web.extensions import get_database
from tests.service.helpers import ADMIN_TOKEN, ApiClient, create_model
from tests.service.predictions_factory import add_version, stored_spec, train_learner

FEATURES = [
    {"name": "flow", "type": "numeric", "min": 0, "max": 50},
    {"name": "pressure", "type": "numeric", "min": 0, "max": 12},
    {"name": "temperature", "type": "numeric", "min": -10, "max": 60},
]
INPUTS = [
    {"flow": 12.5, "pressure": 3.25, "temperature": 18.0},
    {"flow": 41.0, "pressure": 9.5, "temperature": 2.5},
    {"flow": 3.0, "pressure": 7.75, "temperature": 44.0},
]


def rows(n: int, seed: int) -> list[dict[str, float]]:
    rng = np.random.default_rng(seed)
    return [{"flow": float(rng.uniform(0, 50)), "pressure": float(rng.uniform(0, 12)),
             "temperature": float(rng.uniform(-10, 60))} for _ in range(n)]


def binary_rule(row: Mapping[str, float]) -> str:
    return "high" if row["flow"] / 25 + row["pressure"] / 6 - row["temperature"] / 70 > 1.5 \
        else "low"


def multiclass_rule(row: Mapping[str, float]) -> str:
    score = row["flow"] / 50 + row["pressure"] / 12
    return "a" if score < 0.7 else ("b" if score < 1.3 else "c")


def regression_rule(row: Mapping[str, float]) -> float:
    return float(np.sin(row["flow"] / 10) * row["pressure"] + 0.05 * row["temperature"])


MODELS = {
    "binary": {"task": "binary", "classes": ["low", "high"], "rule": binary_rule},
    "multiclass": {"task": "multiclass", "classes": ["a", "b", "c"], "rule": multiclass_rule},
    "regression": {"task": "regression", "classes": None, "rule": regression_rule},
}


@pytest.fixture
def api(sqlite_url: str) -> Iterator[ApiClient]:
    app: Flask = create_app({"KEELSON_DATABASE_URL": sqlite_url,
                             "KEELSON_ADMIN_TOKEN": ADMIN_TOKEN, "TESTING": True})
    yield ApiClient(app)
    get_database(app).engine.dispose()


def serve(api: ApiClient, kind: str) -> str:
    """Create the model over HTTP and store a version trained on its rule."""
    model = MODELS[kind]
    name = f"station-{kind}"
    create_model(api, name=name, task=model["task"], target="state", classes=model["classes"],
                 features=FEATURES, activation="tanh", hidden_layers=[12, 8])
    learner = train_learner(stored_spec(api.app, name), rows(300, seed=1), model["rule"],
                            passes=4)
    add_version(api.app, name, learner.to_bytes())
    return name


def served_output(api: ApiClient, name: str, features: Mapping[str, float],
                  output: Any = None) -> float:
    """f(features) as served: the probability of ``output``, or the value."""
    body = api.request("GET", f"/v1/models/{name}/predictions?"
                       + urlencode({**{k: repr(v) for k, v in features.items()},
                                    "explain": "none"}), 200)
    result = body["result"]
    return float(result["value"] if output is None else result["probabilities"][output])


def explained(api: ApiClient, name: str, features: Mapping[str, float],
              **params: Any) -> dict[str, Any]:
    """The answer's explanation, with the answer's baseline (answered once
    beside it) put in as ``baseline``."""
    query = {**{k: repr(v) for k, v in features.items()}, **params}
    body = api.request("GET", f"/v1/models/{name}/predictions?{urlencode(query)}", 200)
    explanation: dict[str, Any] = {**body["explanation"], "baseline": body["baseline"]}
    return explanation


def outputs(kind: str) -> list[Any]:
    classes = MODELS[kind]["classes"]
    return [None] if classes is None else list(classes)


@pytest.mark.parametrize("kind", list(MODELS))
def test_the_served_gradient_is_a_finite_difference_of_served_predictions(
    api: ApiClient, kind: str
) -> None:
    # Central finite difference: common practice, no source. The step is small
    # against each field's range, so the O(h^2) error stays far below tolerance.
    name = serve(api, kind)
    for x in INPUTS:
        for output in outputs(kind):
            params = {"explain": "gradient"} | ({} if output is None else {"output": output})
            gradient = explained(api, name, x, **params)["attributions"]
            for field in x:
                h = 1e-4
                up = served_output(api, name, {**x, field: x[field] + h}, output)
                down = served_output(api, name, {**x, field: x[field] - h}, output)
                difference = (up - down) / (2 * h)
                assert gradient[field] == pytest.approx(difference, rel=1e-5, abs=1e-8), (
                    kind, output, field)


@pytest.mark.parametrize("kind", list(MODELS))
def test_served_integrated_gradients_sum_to_the_difference_of_served_predictions(
    api: ApiClient, kind: str
) -> None:
    # Completeness (Sundararajan, Taly & Yan 2017): sum(attributions) = f(x) - f(baseline).
    name = serve(api, kind)
    for x in INPUTS:
        for output in outputs(kind):
            params = {"steps": 512} | ({} if output is None else {"output": output})
            explanation = explained(api, name, x, **params)
            baseline = explanation["baseline"]
            assert set(baseline) == set(x)
            f_x = served_output(api, name, x, output)
            f_baseline = served_output(api, name, baseline, output)
            total = sum(explanation["attributions"].values())
            scale = max(1.0, abs(f_x - f_baseline))
            assert total == pytest.approx(f_x - f_baseline, abs=1e-4 * scale), (kind, output)
            assert explanation["value"] == pytest.approx(f_x, rel=1e-12, abs=1e-12)
            assert explanation["baseline_value"] == pytest.approx(f_baseline, rel=1e-12,
                                                                  abs=1e-12)


def test_the_completeness_gap_shrinks_as_steps_grow(api: ApiClient) -> None:
    # The trapezoid rule's error falls as O(1/steps^2) on a smooth path
    # (Sundararajan et al. 2017, section 3: 20 to 300 steps approximate well).
    name = serve(api, "binary")
    x = INPUTS[1]
    f_x = served_output(api, name, x, "high")
    gaps = []
    for steps in (2, 8, 64, 512):
        explanation = explained(api, name, x, steps=steps, output="high")
        f_baseline = served_output(api, name, explanation["baseline"], "high")
        gap = abs(sum(explanation["attributions"].values()) - (f_x - f_baseline))
        assert explanation["completeness_gap"] == pytest.approx(gap, abs=1e-12)
        gaps.append(gap)
    assert gaps == sorted(gaps, reverse=True)
    assert gaps[-1] < 1e-4
    # Eight times the steps: about 64 times smaller once in the asymptotic regime.
    assert gaps[2] / gaps[3] > 30
