"""A model's history (GET /v1/models/{name}/history), and pause and resume
over HTTP: each admin act is an event with its token's name and reason; a
refused act changes nothing and records nothing."""

from __future__ import annotations

from typing import Any

from flask import Flask

from service.store.tables import VersionRow
from service.usecases.common import find_model
from service.versions.decide import Promotion
from service.versions.writes import _maybe_promote
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, add_version, create_model, model_spec


def events(api: ApiClient, name: str = "pump-risk", token: str | None = None,
           query: str = "") -> list[dict[str, Any]]:
    kwargs = {} if token is None else {"token": token}
    page: list[dict[str, Any]] = api.request(
        "GET", f"/v1/models/{name}/history{query}", 200, **kwargs)["events"]
    return page


def test_each_admin_act_is_an_event_with_its_token_name_and_reason(any_api: ApiClient) -> None:
    admin = any_api.token("admin", name="night-shift")
    any_api.request("POST", "/v1/models", 201, json_body=model_spec(), token=admin)
    add_version(any_api.app, "pump-risk", 1)
    any_api.request("POST", "/v1/models/pump-risk/versions/1/promote", 200, token=admin,
                    json_body={"reason": "reviewed by the duty engineer"})
    any_api.request("POST", "/v1/models/pump-risk/retrain", 202, token=admin,
                    json_body={"reason": "new pump family"})
    any_api.request("POST", "/v1/models/pump-risk/pause", 200, token=admin,
                    json_body={"reason": "station shutdown"})
    any_api.request("POST", "/v1/models/pump-risk/resume", 200, token=admin)
    seen = [(e["kind"], e["token"], e["reason"]) for e in events(any_api)]
    assert seen == [
        ("created", "night-shift", None),
        ("promoted", "night-shift", "reviewed by the duty engineer"),
        ("retrain_requested", "night-shift", "new pump family"),
        ("paused", "night-shift", "station shutdown"),
        ("resumed", "night-shift", None),
    ]
    promoted = events(any_api)[1]["details"]
    assert promoted == {"version": 1, "automatic": False, "replaced": None}


def test_an_automatic_promotion_carries_the_figures_that_decided_it(app: Flask,
                                                                   api: ApiClient) -> None:
    create_model(api)
    first = add_version(app, "pump-risk", 1, status="active", active=True)
    second = add_version(app, "pump-risk", 2)
    figures = {"metric": "log_loss", "new": 0.25, "active": 0.5}
    with get_database(app).write() as session:
        model = find_model(session, "pump-risk")
        version = session.get_one(VersionRow, second)
        _maybe_promote(session, model.id, version, Promotion(over=first, figures=figures))
        session.commit()
    last = events(api)[-1]
    assert last["kind"] == "promoted" and last["token"] is None
    assert last["details"] == {"version": 2, "automatic": True, "replaced": 1,
                               "holdout": figures}


def test_pause_shows_on_the_model_and_twice_changes_nothing(any_api: ApiClient) -> None:
    create_model(any_api)
    before = any_api.request("GET", "/v1/models/pump-risk", 200)["trainer"]
    assert before["paused"] is False and "paused_at" not in before
    state = any_api.request("POST", "/v1/models/pump-risk/pause", 200)
    assert state["paused"] is True
    again = any_api.request("POST", "/v1/models/pump-risk/pause", 200)
    assert again == state
    shown = any_api.request("GET", "/v1/models/pump-risk", 200)["trainer"]
    assert shown["paused"] is True and shown["paused_at"] == state["paused_at"]
    assert [e["kind"] for e in events(any_api)] == ["created", "paused"]
    assert any_api.request("POST", "/v1/models/pump-risk/resume", 200) == {
        "paused": False, "paused_at": None}


def test_a_refused_act_records_nothing(api: ApiClient) -> None:
    create_model(api)
    ingest = api.token("ingest")
    api.request("POST", "/v1/models/pump-risk/pause", 403, token=ingest)
    api.request("POST", "/v1/models/pump-risk/pause", 422, json_body={"reason": "x" * 1001})
    api.request("POST", "/v1/models/pump-risk/pause", 422, json_body={"why": "typo"})
    api.request("POST", "/v1/models/pump-risk/versions/7/promote", 404,
                json_body={"reason": "no such version"})
    api.request("POST", "/v1/models/no-such/pause", 404)
    assert [e["kind"] for e in events(api)] == ["created"]
    assert api.request("GET", "/v1/models/pump-risk", 200)["trainer"]["paused"] is False


def test_the_history_pages_by_event_id(any_api: ApiClient) -> None:
    create_model(any_api)
    for _ in range(3):
        any_api.request("POST", "/v1/models/pump-risk/pause", 200)
        any_api.request("POST", "/v1/models/pump-risk/resume", 200)
    first = any_api.request("GET", "/v1/models/pump-risk/history?limit=4", 200)
    assert len(first["events"]) == 4 and first["next"] == first["events"][-1]["id"]
    rest = any_api.request("GET", f"/v1/models/pump-risk/history?after={first['next']}", 200)
    assert rest["next"] is None
    kinds = [e["kind"] for e in first["events"] + rest["events"]]
    assert kinds == ["created"] + ["paused", "resumed"] * 3
    assert [e["id"] for e in first["events"] + rest["events"]] == sorted(
        e["id"] for e in first["events"] + rest["events"])
    any_api.request("GET", "/v1/models/pump-risk/history?limit=0", 422)
    any_api.request("GET", "/v1/models/pump-risk/history?page=2", 422)
