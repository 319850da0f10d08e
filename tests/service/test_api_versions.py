"""GET/POST /v1/models/{name}/versions...: whole bodies and the active pointer."""

from __future__ import annotations

from typing import Any

from flask import Flask
from sqlalchemy import select

from service.store.tables import ModelRow, TrainerRow, VersionRow
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, add_version, create_model, model_row

VERSIONS = "/v1/models/pump-risk/versions"
METRICS = {"holdout": {"log_loss": 0.4, "accuracy": 0.8, "n": 10}, "prequential": {"n": 30}}


def timeless(body: dict[str, Any]) -> dict[str, Any]:
    assert body.pop("created_at").endswith("+00:00")
    return body


def statuses(app: Flask) -> dict[int, str]:
    with get_database(app).read() as session:
        return dict(session.execute(select(VersionRow.number, VersionRow.status)).all())


def test_versions_are_listed_oldest_first_with_every_field(
    any_api: ApiClient, any_app: Flask
) -> None:
    create_model(any_api)
    assert any_api.request("GET", VERSIONS, 200) == {"versions": [], "next": None}
    add_version(any_app, "pump-risk", 1, status="active", cursor=30, records_seen=30,
                metrics=METRICS, active=True)
    add_version(any_app, "pump-risk", 2, parent=1, cursor=60, records_seen=60)
    add_version(any_app, "pump-risk", 3, origin="retrain", cursor=60, records_seen=48)
    body = any_api.request("GET", VERSIONS, 200)
    assert [timeless(v) for v in body["versions"]] == [
        {"number": 1, "origin": "online", "status": "active", "records_seen": 30,
         "cursor": 30, "metrics": METRICS, "promoted_at": None, "parent": None,
         "settings_from_seq": None, "forgotten_records": 0},
        {"number": 2, "origin": "online", "status": "candidate", "records_seen": 60,
         "cursor": 60, "metrics": {}, "promoted_at": None, "parent": 1,
         "settings_from_seq": None, "forgotten_records": 0},
        {"number": 3, "origin": "retrain", "status": "candidate", "records_seen": 48,
         "cursor": 60, "metrics": {}, "promoted_at": None, "parent": None,
         "settings_from_seq": None, "forgotten_records": 0},
    ]
    one = any_api.request("GET", f"{VERSIONS}/2", 200)
    assert timeless(one) == timeless(any_api.request("GET", VERSIONS, 200)["versions"][1])
    assert any_api.request("GET", "/v1/models/pump-risk", 200)["active_version"] == 1


def test_promoting_moves_the_pointer_and_retires_the_old_active(
    any_api: ApiClient, any_app: Flask
) -> None:
    create_model(any_api)
    add_version(any_app, "pump-risk", 1, status="active", active=True, cursor=10)
    add_version(any_app, "pump-risk", 2, origin="retrain", cursor=20)
    body = any_api.request("POST", f"{VERSIONS}/2/promote", 200)
    assert body["number"] == 2 and body["status"] == "active"
    assert body["promoted_at"].endswith("+00:00")
    assert statuses(any_app) == {1: "retired", 2: "active"}
    with get_database(any_app).read() as session:
        active_id = session.scalars(select(ModelRow.active_version_id)).one()
        number = session.scalars(select(VersionRow.number).where(VersionRow.id == active_id)).one()
    assert number == 2
    assert any_api.request("GET", "/v1/models/pump-risk", 200)["active_version"] == 2


def test_rolling_back_to_an_older_version(api: ApiClient, app: Flask) -> None:
    create_model(api)
    add_version(app, "pump-risk", 1, status="retired", cursor=10)
    add_version(app, "pump-risk", 2, parent=1, status="active", active=True, cursor=20)
    with get_database(app).write() as session:
        trainer = session.scalars(select(TrainerRow)).one()
        trainer.head_version_id = model_row(app, "pump-risk").active_version_id
        trainer.cursor = 20
        session.commit()
    api.request("POST", f"{VERSIONS}/1/promote", 200)
    assert statuses(app) == {1: "active", 2: "retired"}
    assert api.request("GET", "/v1/models/pump-risk", 200)["trainer"]["cursor"] == 20


def test_promoting_the_active_version_again_changes_nothing(api: ApiClient, app: Flask) -> None:
    create_model(api)
    add_version(app, "pump-risk", 1, status="active", active=True)
    body = api.request("POST", f"{VERSIONS}/1/promote", 200)
    assert body["status"] == "active" and body["promoted_at"] is None
    assert statuses(app) == {1: "active"}


def test_unknown_versions_and_models_are_not_found(api: ApiClient, app: Flask) -> None:
    create_model(api)
    add_version(app, "pump-risk", 1)
    for method, path in [("GET", f"{VERSIONS}/2"), ("POST", f"{VERSIONS}/9/promote"),
                         ("GET", "/v1/models/nope/versions"), ("GET", f"{VERSIONS}/x"),
                         ("GET", f"{VERSIONS}/-1"), ("POST", "/v1/models/nope/versions/1/promote")]:
        body = api.request(method, path, 404)
        assert body["status"] == 404
    assert statuses(app) == {1: "candidate"}
    assert model_row(app, "pump-risk").active_version_id is None
