"""GET and POST /v1/models/{name}/predictions: docs/http-api.md, whole bodies.

Versions are made without the worker (tests.service.predictions_factory); the
expected bodies are computed from the same stored snapshot through the engine's
public names, so each test checks what the HTTP layer adds: parsing, version
choice, class spelling and the body's shape.
"""

from __future__ import annotations

import logging
import pickle
import threading
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import event

from engine import Learner
from service.web.extensions import get_database, get_version_cache
from service.web.schemas.predictions import PredictionBatchSchema, PredictionSchema
from tests.service.conftest import build_app
from tests.service.helpers import ApiClient, create_model
from tests.service.predictions_factory import (
    activate,
    add_version,
    numeric_rows,
    pump_rows,
    pump_rule,
    stored_spec,
    train_learner,
)

PATH = "/v1/models/pump-risk/predictions"
PUMP = {"vibration_rms": 72.5, "pump_family": "screw", "has_vfd": False}
PUMP_QUERY = "vibration_rms=72.5&pump_family=screw&has_vfd=false"


def pump_version(api: ApiClient, *, activate_it: bool = True, passes: int = 3,
                 seed: int = 0) -> Learner:
    """Train a learner on the pump rule, store it as the next version, return it
    as the service will load it (from the snapshot bytes)."""
    spec = stored_spec(api.app, "pump-risk")
    learner = train_learner(spec, pump_rows(200, seed), pump_rule, passes=passes)
    snapshot = learner.to_bytes()
    add_version(api.app, "pump-risk", snapshot, activate=activate_it)
    return Learner.from_bytes(snapshot)


def explanation_body(learner: Learner, features: Mapping[str, Any], method: str, output: Any,
                     **kwargs: Any) -> dict[str, Any]:
    e = learner.explain(features, method=method, output=output, **kwargs)
    return {"method": method, "output": e.output, "attributions": e.attributions,
            "completeness_gap": e.completeness_gap,
            "value": e.value, "baseline_value": e.baseline_value}


def baseline_of(learner: Learner) -> dict[str, Any]:
    """The reference input of every explanation the version answers: its input
    mean in raw units, answered once per answer (not per record)."""
    return learner.encoder.raw_baseline(learner.input_mean)


def pump_answers(learner: Learner, rows: list[dict[str, Any]], *, method: str =
                 "integrated_gradients", output: str | None = None,
                 **kwargs: Any) -> list[dict[str, Any]]:
    """The expected ``{"result", "explanation"}`` of each row; the rows are scored
    together, as one request scores them (a batch matrix product may differ from
    a one-row product in the last bit)."""
    answers = []
    for row, (p_ok, p_failed) in zip(rows, learner.predict(learner.encode(rows)).tolist(),
                                      strict=True):
        label = "failed" if p_failed > p_ok else "ok"
        answers.append({
            "result": {"label": label, "probabilities": {"ok": p_ok, "failed": p_failed}},
            "explanation": None if method == "none" else explanation_body(
                learner, row, method, output or label, **kwargs),
        })
    return answers


def pump_answer(learner: Learner, features: dict[str, Any], **kwargs: Any) -> dict[str, Any]:
    return pump_answers(learner, [features], **kwargs)[0]


def test_get_answers_the_contract_body_with_integrated_gradients(any_api: ApiClient) -> None:
    create_model(any_api)
    learner = pump_version(any_api)
    body = any_api.request("GET", f"{PATH}?{PUMP_QUERY}", 200)
    assert any_api.last.mimetype == "application/json"
    assert body == {"model": "pump-risk", "version": 1, "baseline": baseline_of(learner),
                    **pump_answer(learner, PUMP)}
    assert body["explanation"]["completeness_gap"] < 1e-3
    assert PredictionSchema().validate(body) == {}


@pytest.mark.parametrize("method", ["gradient", "gradient_times_input", "smoothgrad", "none"])
def test_every_explanation_method_is_served(api: ApiClient, method: str) -> None:
    create_model(api)
    learner = pump_version(api)
    body = api.request("GET", f"{PATH}?{PUMP_QUERY}&explain={method}", 200)
    assert body == {"model": "pump-risk", "version": 1,
                    "baseline": None if method == "none" else baseline_of(learner),
                    **pump_answer(learner, PUMP, method=method)}
    if method == "none":
        assert body["explanation"] is None  # documented: null, the key stays


def test_output_steps_and_smoothgrad_parameters_reach_the_engine(api: ApiClient) -> None:
    create_model(api)
    learner = pump_version(api)
    body = api.request("GET", f"{PATH}?{PUMP_QUERY}&output=ok&steps=16", 200)
    assert body["explanation"] == explanation_body(learner, PUMP, "integrated_gradients",
                                                   "ok", steps=16)
    body = api.request(
        "GET", f"{PATH}?{PUMP_QUERY}&explain=smoothgrad&samples=8&noise=0.5&seed=3", 200)
    assert body["explanation"] == explanation_body(learner, PUMP, "smoothgrad", body[
        "result"]["label"], samples=8, noise=0.5, seed=3)


def test_post_scores_a_batch_in_input_order(any_api: ApiClient) -> None:
    create_model(any_api)
    learner = pump_version(any_api)
    rows = pump_rows(5, seed=11)
    body = any_api.request("POST", PATH, 200, json_body={
        "records": [{"features": row} for row in rows], "explain": "gradient"})
    # The baseline, the same for every record, once beside the results.
    assert body == {"model": "pump-risk", "version": 1, "baseline": baseline_of(learner),
                    "results": pump_answers(learner, rows, method="gradient")}
    assert PredictionBatchSchema().validate(body) == {}


def test_post_takes_the_optional_parameters_in_the_query_too(api: ApiClient) -> None:
    create_model(api)
    learner = pump_version(api)
    body = api.request("POST", f"{PATH}?explain=gradient_times_input&output=failed", 200,
                       json_body={"records": [{"features": PUMP}]})
    assert body["results"] == [pump_answer(learner, PUMP, method="gradient_times_input",
                                           output="failed")]
    same = api.request("POST", f"{PATH}?steps=8", 200,
                       json_body={"records": [{"features": PUMP}], "steps": 8})
    assert same["results"] == [pump_answer(learner, PUMP, steps=8)]


def test_boolean_classes_are_spelled_false_and_true(api: ApiClient) -> None:
    create_model(api, classes=None)
    spec = stored_spec(api.app, "pump-risk")
    learner = train_learner(spec, pump_rows(200), lambda row: pump_rule(row) == "failed")
    add_version(api.app, "pump-risk", learner.to_bytes())
    body = api.request("GET", f"{PATH}?{PUMP_QUERY}&output=true&explain=gradient", 200)
    p_false, p_true = learner.predict(learner.encode([PUMP]))[0].tolist()
    assert body == {
        "model": "pump-risk", "version": 1, "baseline": baseline_of(learner),
        "result": {"label": p_true > p_false, "probabilities": {"false": p_false,
                                                                "true": p_true}},
        "explanation": explanation_body(learner, PUMP, "gradient", True),
    }
    assert body["explanation"]["output"] is True
    posted = api.request("POST", PATH, 200, json_body={
        "records": [{"features": PUMP}], "output": False, "explain": "gradient"})
    assert posted["results"][0]["explanation"] == explanation_body(
        learner, PUMP, "gradient", False)


def test_regression_answers_a_value(api: ApiClient) -> None:
    create_model(api, name="flow", task="regression", target="litres", classes=None,
                 features=[{"name": "a", "type": "numeric"}, {"name": "b", "type": "numeric"}])
    spec = stored_spec(api.app, "flow")
    learner = train_learner(spec, numeric_rows(200), lambda r: 2 * r["a"] - r["b"])
    add_version(api.app, "flow", learner.to_bytes())
    body = api.request("GET", "/v1/models/flow/predictions?a=3.5&b=-1", 200)
    x = {"a": 3.5, "b": -1.0}
    value = learner.predict(learner.encode([x]))[0, 0]
    assert body == {"model": "flow", "version": 1, "baseline": baseline_of(learner),
                    "result": {"value": value},
                    "explanation": explanation_body(learner, x, "integrated_gradients", None)}
    assert body["explanation"]["output"] is None


def test_a_pinned_version_answers_while_another_is_active(any_api: ApiClient) -> None:
    create_model(any_api)
    first = pump_version(any_api, passes=1)
    second = pump_version(any_api, passes=4, seed=5)
    body = any_api.request("GET", f"{PATH}?{PUMP_QUERY}&version=1", 200)
    assert body == {"model": "pump-risk", "version": 1, "baseline": baseline_of(first),
                    **pump_answer(first, PUMP)}
    body = any_api.request("GET", f"{PATH}?{PUMP_QUERY}", 200)
    assert body == {"model": "pump-risk", "version": 2, "baseline": baseline_of(second),
                    **pump_answer(second, PUMP)}
    missing = any_api.request("GET", f"{PATH}?{PUMP_QUERY}&version=9", 404)
    assert missing["errors"] == {"version": ["No version 9."]}
    assert missing["status"] == 404


def test_a_model_without_an_active_version_answers_409(any_api: ApiClient) -> None:
    create_model(any_api)
    body = any_api.request("GET", f"{PATH}?{PUMP_QUERY}", 409)
    assert body == {
        "type": "about:blank", "title": "Conflict", "status": 409,
        "detail": "Model 'pump-risk' has no active version yet: send records and let the "
                  "worker write one, or promote a version.",
    }
    any_api.request("POST", PATH, 409, json_body={"records": [{"features": PUMP}]})
    pump_version(any_api, activate_it=False)
    any_api.request("GET", f"{PATH}?{PUMP_QUERY}&version=1", 200)  # pinning still serves


def test_an_unknown_model_answers_404(api: ApiClient) -> None:
    body = api.request("GET", "/v1/models/nothing-here/predictions?x=1", 404)
    assert body["detail"] == "There is no model named 'nothing-here'."
    api.request("GET", "/v1/models/Bad..Name/predictions", 404)


def test_a_promotion_is_served_within_the_staleness_bound(sqlite_url: str) -> None:
    bound = 1.0  # the largest allowed: the most room for a slow machine
    app = build_app(sqlite_url, KEELSON_ACTIVE_STALENESS_SECONDS=bound)
    api = ApiClient(app)
    cache = get_version_cache(app)
    try:
        create_model(api)
        pump_version(api)
        pump_version(api, activate_it=False, seed=3)
        assert api.request("GET", f"{PATH}?{PUMP_QUERY}", 200)["version"] == 1
        activate(api.app, "pump-risk", 2)
        promoted_at = time.monotonic()
        while True:
            started = time.monotonic()
            if api.request("GET", f"{PATH}?{PUMP_QUERY}", 200)["version"] == 2:
                break
            # The old version may answer only requests that began within the
            # bound of the promotion (the pointer this process held was read
            # before it; the cache stamps a read before it makes it).
            assert started <= promoted_at + bound, "served the old version past the bound"
            time.sleep(0.01)

        # Served from the cache until then, and not a moment longer: on the
        # cache's own clock, held still (how long a request takes on a busy
        # machine must not decide what this checks).
        now = [time.monotonic() + 2 * bound]  # the pointer is stale: read afresh below
        cache._clock = lambda: now[0]
        assert api.request("GET", f"{PATH}?{PUMP_QUERY}", 200)["version"] == 2
        activate(api.app, "pump-risk", 1)
        assert api.request("GET", f"{PATH}?{PUMP_QUERY}", 200)["version"] == 2
        now[0] += bound  # exactly at the bound: still the pointer this process holds
        assert api.request("GET", f"{PATH}?{PUMP_QUERY}", 200)["version"] == 2
        now[0] += 0.001
        assert api.request("GET", f"{PATH}?{PUMP_QUERY}", 200)["version"] == 1
    finally:
        get_database(app).engine.dispose()


def test_a_warm_get_makes_no_database_query(api: ApiClient) -> None:
    create_model(api)
    pump_version(api)
    # The cache's clock held still: the active pointer never ages past its
    # bound here, however long the requests take on a busy machine (that it
    # is re-read once older is the test above).
    moment = time.monotonic()
    get_version_cache(api.app)._clock = lambda: moment
    api.request("GET", f"{PATH}?{PUMP_QUERY}", 200)  # warms model, version and readers
    statements: list[str] = []
    engine = get_database(api.app).engine
    listener = lambda *args: statements.append(args[2])  # noqa: E731
    event.listen(engine, "before_cursor_execute", listener)
    try:
        for _ in range(20):
            api.request("GET", f"{PATH}?{PUMP_QUERY}&explain=gradient", 200)
    finally:
        event.remove(engine, "before_cursor_execute", listener)
    assert all(s.strip().upper() in ("BEGIN", "COMMIT", "ROLLBACK") for s in statements), (
        statements)


def test_a_corrupt_snapshot_is_a_503_problem_and_never_runs_code(
    api: ApiClient, tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    create_model(api)
    marker = tmp_path / "executed"

    class Payload:
        def __reduce__(self) -> tuple[Any, ...]:
            return (Path.touch, (marker,))

    add_version(api.app, "pump-risk", pickle.dumps(Payload()))
    now = [time.monotonic()]  # the cache's clock, moved by the test
    get_version_cache(api.app)._clock = lambda: now[0]
    with caplog.at_level(logging.ERROR, logger="service.versions.cache"):
        body = api.request("GET", f"{PATH}?{PUMP_QUERY}", 503)
    assert body == {
        "type": "about:blank", "title": "Service Unavailable", "status": 503,
        "detail": "Version 1 of model 'pump-risk' cannot be loaded (its stored snapshot is "
                  "unreadable; the error is logged). Promote another version.",
    }
    assert not marker.exists()
    assert "snapshot of version 1" in caplog.text
    truncated = pump_version(api).to_bytes()[:200]
    add_version(api.app, "pump-risk", truncated)
    now[0] += 1.001  # past the bound: the active pointer is read again
    api.request("GET", f"{PATH}?{PUMP_QUERY}", 503)
    api.request("GET", f"{PATH}?{PUMP_QUERY}&version=2", 200)  # a good version still serves


def test_concurrent_requests_share_one_cached_network_safely(api: ApiClient) -> None:
    create_model(api)
    learner = pump_version(api)
    rows = pump_rows(8, seed=21)
    expected = [pump_answer(learner, row) for row in rows]
    api.request("GET", f"{PATH}?{PUMP_QUERY}", 200)
    failures: list[Any] = []

    def ask(offset: int) -> None:
        client = api.app.test_client()
        for i in range(20):
            row = rows[(i + offset) % len(rows)]
            response = client.post(PATH, json={"records": [{"features": row}]},
                                   headers={"Authorization": "Bearer test-admin-token"})
            if response.get_json()["results"] != [expected[(i + offset) % len(rows)]]:
                failures.append(response.get_json())

    threads = [threading.Thread(target=ask, args=(k,)) for k in range(4)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert failures == []
    assert len(get_version_cache(api.app)._versions) == 1


def test_a_staleness_bound_above_one_second_fails_at_app_creation(sqlite_url: str) -> None:
    # docs/architecture.md, invariant 3: promotions visible within a short bound (<= 1 s).
    with pytest.raises(ValueError, match="max_age"):
        build_app(sqlite_url, KEELSON_ACTIVE_STALENESS_SECONDS=2.5)


def test_the_openapi_document_describes_both_prediction_routes(api: ApiClient) -> None:
    doc = api.request("GET", "/openapi.json", 200, token=None)
    route = doc["paths"]["/v1/models/{name}/predictions"]
    parameters = {p["name"]: p for p in route["get"]["parameters"]}
    assert set(parameters) == {"features", "explain", "version", "output", "steps", "samples",
                               "noise", "seed"}
    assert parameters["explain"]["schema"]["enum"] == [
        "integrated_gradients", "gradient", "gradient_times_input", "smoothgrad", "shapley",
        "none"]
    assert parameters["steps"]["schema"] == {"type": "integer", "minimum": 2, "maximum": 1024}
    assert route["get"]["x-scope"] == route["post"]["x-scope"] == "predict"
    ok = route["get"]["responses"]["200"]["content"]["application/json"]["schema"]
    assert ok == {"$ref": "#/components/schemas/Prediction"}
    body = route["post"]["requestBody"]["content"]["application/json"]["schema"]
    assert body == {"$ref": "#/components/schemas/PredictionRequest"}
    request_schema = doc["components"]["schemas"]["PredictionRequest"]
    assert request_schema["required"] == ["records"]
    assert set(request_schema["properties"]) == set(parameters) - {"features"} | {"records"}
    explanation = doc["components"]["schemas"]["Explanation"]
    assert set(explanation["required"]) == {"method", "output", "attributions",
                                            "completeness_gap", "value", "baseline_value"}
    for answer in ("Prediction", "PredictionBatch"):
        assert "baseline" in doc["components"]["schemas"][answer]["required"]
