"""Scored cases: a keyed prediction is kept before its answer (docs/http-api.md,
"Scored cases"); the same key again is a re-score, other features a 409."""

from __future__ import annotations

from typing import Any

from flask import Flask
from sqlalchemy import func, select
from werkzeug.datastructures import MultiDict

from service.store.tables import ScoredCaseRow, VersionRow
from service.web.extensions import get_database, get_version_cache
from service.web.schemas.predictions import build_readers
from service.web.schemas.rules import rules_for
from tests.service.helpers import ApiClient, create_model
from tests.service.test_predictions_api import PATH, PUMP, PUMP_QUERY, pump_version


def cases(app: Flask) -> list[ScoredCaseRow]:
    with get_database(app).read() as session:
        return list(session.scalars(select(ScoredCaseRow).order_by(ScoredCaseRow.id)))


def case_count(app: Flask) -> int:
    with get_database(app).read() as session:
        return int(session.scalar(select(func.count()).select_from(ScoredCaseRow)) or 0)


def test_a_keyed_get_stores_the_case_before_answering(any_api: ApiClient) -> None:
    create_model(any_api)
    pump_version(any_api)
    plain = any_api.request("GET", f"{PATH}?{PUMP_QUERY}", 200)
    assert case_count(any_api.app) == 0  # unkeyed: nothing kept
    body = any_api.request("GET", f"{PATH}?{PUMP_QUERY}&key=station-7%2F2026-11", 200)
    assert body == {**plain, "key": "station-7/2026-11", "rescored": False}
    (case,) = cases(any_api.app)
    with get_database(any_api.app).read() as session:
        version_id = session.scalar(select(VersionRow.id).where(VersionRow.number == 1))
    assert (case.key, case.features, case.version_id, case.output, case.rescored,
            case.outcome, case.outcome_at) == (
        "station-7/2026-11", PUMP, version_id, plain["result"]["probabilities"], 0, None, None)
    assert case.scored_at is not None


def test_the_same_key_and_features_again_is_a_rescore(any_api: ApiClient) -> None:
    create_model(any_api)
    pump_version(any_api)
    first = any_api.request("GET", f"{PATH}?{PUMP_QUERY}&key=k1&explain=none", 200)
    again = any_api.request("GET", f"{PATH}?{PUMP_QUERY}&key=k1&explain=none", 200)
    assert again == {**first, "rescored": True}
    # The same case by POST (features as JSON values, the same once validated).
    batch = any_api.request("POST", PATH, 200, json_body={
        "explain": "none", "records": [{"key": "k1", "features": PUMP}]})
    assert batch["results"][0]["rescored"] is True
    (case,) = cases(any_api.app)
    assert case.rescored == 2
    assert case.features == PUMP


def test_the_same_key_with_other_features_is_a_409_naming_it(any_api: ApiClient) -> None:
    create_model(any_api)
    pump_version(any_api)
    any_api.request("GET", f"{PATH}?{PUMP_QUERY}&key=k1", 200)
    before = [(c.key, c.features, c.rescored) for c in cases(any_api.app)]
    problem = any_api.request(
        "GET", f"{PATH}?vibration_rms=10&pump_family=screw&has_vfd=false&key=k1", 409)
    assert "'k1'" in problem["detail"]
    assert problem["errors"] == {"key": ["Case 'k1' was scored before with other features."]}
    # In a batch: every conflicting key named by its record, and nothing stored.
    problem = any_api.request("POST", PATH, 409, json_body={"records": [
        {"key": "k2", "features": PUMP},
        {"key": "k1", "features": {**PUMP, "has_vfd": True}},
        {"key": "k3", "features": PUMP},
        {"key": "k3", "features": {**PUMP, "pump_family": "centrifugal"}},
    ]})
    assert set(problem["errors"]) == {"records.1.key", "records.3.key"}
    assert [(c.key, c.features, c.rescored) for c in cases(any_api.app)] == before


def test_a_batch_keeps_only_its_keyed_records(any_api: ApiClient) -> None:
    create_model(any_api)
    pump_version(any_api)
    other = {**PUMP, "vibration_rms": 20.0}
    body = any_api.request("POST", PATH, 200, json_body={"explain": "none", "records": [
        {"key": "a", "features": PUMP}, {"features": other}, {"key": "b", "features": other},
    ]})
    assert [r.get("key") for r in body["results"]] == ["a", None, "b"]
    assert "rescored" not in body["results"][1]
    stored = {c.key: (c.features, c.output) for c in cases(any_api.app)}
    assert stored == {"a": (PUMP, body["results"][0]["result"]["probabilities"]),
                      "b": (other, body["results"][2]["result"]["probabilities"])}


def test_bad_keys_are_refused_and_store_nothing(api: ApiClient) -> None:
    create_model(api)
    pump_version(api)
    problem = api.request("GET", f"{PATH}?{PUMP_QUERY}&key=", 422)
    assert "key" in problem["errors"]
    problem = api.request("POST", PATH, 422, json_body={
        "records": [{"key": "x" * 201, "features": PUMP}]})
    assert "records.0.key" in problem["errors"]
    problem = api.request("GET", f"{PATH}?{PUMP_QUERY}&key=a&key=b", 422)
    assert problem["errors"]["key"] == ["Given more than once."]
    assert case_count(api.app) == 0


def test_a_spec_cannot_declare_a_feature_named_like_a_query_parameter(api: ApiClient) -> None:
    problem = api.request("POST", "/v1/models", 422, json_body={
        "name": "clash", "task": "regression", "target": "y",
        "features": [{"name": "x", "type": "numeric"}, {"name": "key", "type": "numeric"}]})
    assert problem["errors"] == {"features.1.name": ["This name is reserved."]}


def test_a_stored_model_whose_feature_clashes_keeps_working() -> None:
    """A model stored before ``key`` was reserved: ``key`` stays its feature in
    the query string, and GET /v1/models/{name} names the clash."""
    spec: dict[str, Any] = {"task": "regression", "target": "y", "features": [
        {"name": "key", "type": "numeric"}, {"name": "seed", "type": "boolean"}]}
    readers = build_readers(rules_for(spec))
    features, options, key = readers.read_query(MultiDict({"key": "2.5", "seed": "true"}))
    assert (features, key, options.seed) == ({"key": 2.5, "seed": True}, None, 0)
    from service.usecases.models import reserved_name_clashes
    assert reserved_name_clashes(spec) == ["key", "seed"]


def test_a_case_keeps_the_version_that_scored_it(any_api: ApiClient) -> None:
    create_model(any_api)
    pump_version(any_api)
    pump_version(any_api, seed=1)  # version 2 is active now
    get_version_cache(any_api.app).clear()
    old = any_api.request("GET", f"{PATH}?{PUMP_QUERY}&key=old&version=1&explain=none", 200)
    new = any_api.request("GET", f"{PATH}?{PUMP_QUERY}&key=new&explain=none", 200)
    assert (old["version"], new["version"]) == (1, 2)
    with get_database(any_api.app).read() as session:
        ids = dict(session.execute(select(VersionRow.number, VersionRow.id)).all())
    stored = {c.key: (c.version_id, c.output) for c in cases(any_api.app)}
    assert stored == {"old": (ids[1], old["result"]["probabilities"]),
                      "new": (ids[2], new["result"]["probabilities"])}
