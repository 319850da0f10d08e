"""PATCH /v1/models/{name}: settings that keep the network and the fields
change in place, recorded in the history at the model's record position;
anything that would need a new model is refused (422) with nothing changed."""

from __future__ import annotations

from typing import Any

import pytest
from flask import Flask

from service.store.tables import ModelEventRow
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, count_records, create_model, ingest_raw, record
from tests.service.test_token_models import everything


def history(api: ApiClient) -> list[dict[str, Any]]:
    events: list[dict[str, Any]] = api.request(
        "GET", "/v1/models/pump-risk/history", 200)["events"]
    return events


def test_a_change_is_kept_with_its_position_token_and_reason(any_api: ApiClient) -> None:
    create_model(any_api)
    ingest_raw(get_database(any_api.app).write, "pump-risk", [record(i) for i in range(5)])
    admin = any_api.token("admin", name="operations")
    model = any_api.request("PATCH", "/v1/models/pump-risk", 200, token=admin, json_body={
        "training": {"learning_rate": 0.002, "checkpoint_every": 500},
        "promotion": "manual", "alarm": {"threshold": 80},
        "reason": "noisy month"})
    assert model["training"]["learning_rate"] == 0.002
    assert model["training"]["checkpoint_every"] == 500
    assert model["training"]["momentum"] == 0.9  # untouched options stay
    assert model["promotion"] == "manual" and model["alarm"]["threshold"] == 80
    assert any_api.request("GET", "/v1/models/pump-risk", 200) == model
    change = history(any_api)[-1]
    assert (change["kind"], change["token"], change["reason"]) == (
        "settings_changed", "operations", "noisy month")
    last_seq = max_seq(any_api.app)
    assert change["at_seq"] == last_seq
    assert change["details"]["changes"]["training.learning_rate"] == {"from": 0.01,
                                                                      "to": 0.002}
    assert change["details"]["changes"]["promotion"] == {"from": "auto", "to": "manual"}
    assert change["details"]["settings"]["training"] == model["training"]


def max_seq(app: Flask) -> int:
    from sqlalchemy import func, select

    from service.store.tables import RecordRow
    with get_database(app).read() as session:
        return int(session.scalar(select(func.max(RecordRow.seq))) or 0)


@pytest.mark.parametrize("body", [
    {"features": [{"name": "vibration_rms", "type": "numeric"}]},
    {"classes": ["ok", "broken"]},
    {"hidden_layers": [4]},
    {"activation": "relu"},
    {"task": "regression"},
    {"target": "other"},
    {"name": "renamed"},
    {"training": {"optimizer": "adam"}},
    {"training": {"learning_rate": 0.002}, "hidden_layers": [4]},
])
def test_what_needs_a_new_model_is_refused_with_nothing_changed(api: ApiClient,
                                                                body: dict[str, Any]) -> None:
    create_model(api)
    before = everything(api.app)
    problem = api.request("PATCH", "/v1/models/pump-risk", 422, json_body=body)
    assert "new model" in str(problem["errors"])
    assert everything(api.app) == before


@pytest.mark.parametrize("body", [
    {"training": {"learning_rate": 0}},
    {"training": {"learning_rate": "fast"}},
    {"training": {"lerning_rate": 0.1}},
    {"promotion": "sometimes"},
    {"alarm": {"threshold": -1}},
    {"reason": "x" * 1001},
    {"retention": 5},
    [],
])
def test_invalid_settings_are_refused_by_the_spec_rules(api: ApiClient, body: Any) -> None:
    create_model(api)
    before = everything(api.app)
    api.request("PATCH", "/v1/models/pump-risk", 422, json_body=body)
    assert everything(api.app) == before


def test_the_size_limits_still_apply_to_a_patched_spec(app: Flask) -> None:
    from tests.service.conftest import build_app
    limited = build_app(app.config["KEELSON_DATABASE_URL"],
                        KEELSON_MAX_VERSION_BYTES_PER_RECORD=10)
    api = ApiClient(limited)
    create_model(api, training={"checkpoint_every": 100_000})
    before = everything(limited)
    problem = api.request("PATCH", "/v1/models/pump-risk", 422,
                          json_body={"training": {"checkpoint_every": 1}})
    assert "checkpoint_every" in str(problem["errors"])
    assert everything(limited) == before


def test_a_change_to_the_same_values_records_nothing(api: ApiClient) -> None:
    create_model(api)
    api.request("PATCH", "/v1/models/pump-risk", 200,
                json_body={"training": {"learning_rate": 0.01}, "promotion": "auto"})
    with get_database(api.app).read() as session:
        kinds = [row.kind for row in session.query(ModelEventRow)]
    assert kinds == ["created"]
    assert count_records(api.app) == 0


def test_records_checked_before_a_settings_change_are_still_stored(api: ApiClient) -> None:
    # This process cached the spec with the records' rules; a settings change
    # leaves the rules as they were, so the records are not "changed under" it.
    create_model(api)
    api.request("POST", "/v1/models/pump-risk/records", 201,
                json_body={"records": [record(0)]})
    with get_database(api.app).write() as session:
        from service.usecases.common import find_model
        find_model(session, "pump-risk").spec = {
            **find_model(session, "pump-risk").spec, "promotion": "manual"}
        session.commit()
    api.request("POST", "/v1/models/pump-risk/records", 201,
                json_body={"records": [record(1)]})
    assert count_records(api.app) == 2
