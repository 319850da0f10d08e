"""Operations routes, the OpenAPI document, the error envelope and headers."""

from __future__ import annotations

import logging
import re
from pathlib import Path

import pytest
from flask import Flask
from openapi_spec_validator import validate

from service.web.auth import public
from service.web.extensions import get_database
from tests.service.conftest import build_app
from tests.service.helpers import ApiClient, create_model

PROBLEM = "application/problem+json"


def test_health_needs_no_token_and_no_database(tmp_path: Path) -> None:
    app = build_app(f"sqlite:///{tmp_path}/missing/never.db")
    response = app.test_client().get("/healthz")
    assert (response.status_code, response.get_json()) == (200, {"status": "ok"})


def test_ready_when_the_database_is_migrated(any_api: ApiClient) -> None:
    assert any_api.request("GET", "/readyz", 200, token=None) == {"status": "ready"}


def test_not_ready_on_a_database_without_the_schema(tmp_path: Path) -> None:
    app = build_app(f"sqlite:///{tmp_path}/empty.db")
    body = ApiClient(app).request("GET", "/readyz", 503, token=None)
    assert body == {"type": "about:blank", "title": "Service Unavailable", "status": 503,
                    "detail": "The database schema is not current; run `keelson db upgrade`."}


def test_not_ready_when_the_database_is_unreachable() -> None:
    # Port 9 (discard) on loopback: nothing listens, the connection is refused.
    app = build_app("postgresql+psycopg://nobody@127.0.0.1:9/none?connect_timeout=2")
    body = ApiClient(app).request("GET", "/readyz", 503, token=None)
    # A public answer: no driver or exception class, no URL (it names a user).
    assert body["detail"] == "The database is unreachable."


def test_the_openapi_document_validates_and_covers_every_route(api: ApiClient, app: Flask) -> None:
    doc = api.request("GET", "/openapi.json", 200, token=None)
    validate(doc)  # OpenAPI 3.0 rules, checked by openapi-spec-validator
    assert doc["openapi"].startswith("3.")
    rules = {
        re.sub(r"<(?:[^:<>]+:)?([^<>]+)>", r"{\1}", rule.rule)
        for rule in app.url_map.iter_rules()
        # /metrics is Prometheus text; the pages (blueprint "pages") are HTML for
        # people, documented in docs/http-api.md, "Pages", not API operations.
        if rule.rule not in ("/metrics",) and not rule.endpoint.startswith("pages.")
    }
    assert rules <= set(doc["paths"])
    post = doc["paths"]["/v1/models"]["post"]
    assert post["security"] == [{"bearer": []}] and post["x-scope"] == "admin"
    assert post["requestBody"]["content"]["application/json"]["schema"] == {
        "$ref": "#/components/schemas/ModelSpec"}
    assert doc["paths"]["/healthz"]["get"]["security"] == []
    records = doc["paths"]["/v1/models/{name}/records"]["post"]["requestBody"]["content"]
    assert set(records) == {"application/json", "text/csv"}
    spec = doc["components"]["schemas"]["ModelSpec"]
    assert set(spec["required"]) == {"name", "task", "target", "features"}
    assert spec["properties"]["name"]["pattern"] == "^[a-z0-9][a-z0-9-]{0,63}$"
    assert doc["components"]["securitySchemes"]["bearer"] == {"type": "http",
                                                              "scheme": "bearer"}


def test_every_answer_carries_security_headers_and_no_cors(api: ApiClient) -> None:
    create_model(api)
    for path, status in [("/healthz", 200), ("/v1/models", 200), ("/nowhere", 404)]:
        response = api.client.get(path, headers={"Authorization": "Bearer test-admin-token",
                                                 "Origin": "https://elsewhere.example"})
        assert response.status_code == status
        assert response.headers["X-Content-Type-Options"] == "nosniff"
        assert response.headers["X-Frame-Options"] == "DENY"
        assert "Access-Control-Allow-Origin" not in response.headers


def test_unknown_paths_and_methods_are_problems_not_html(api: ApiClient) -> None:
    body = api.request("GET", "/v1/nothing-here", 404, token=None)
    assert body["title"] == "Not Found" and body["type"] == "about:blank"
    body = api.request("DELETE", "/v1/models", 405)
    assert body["status"] == 405
    assert set(api.last.headers["Allow"].split(", ")) >= {"GET", "POST"}


def test_an_unexpected_error_is_logged_and_answered_without_its_traceback(
    sqlite_url: str, caplog: pytest.LogCaptureFixture
) -> None:
    app = build_app(sqlite_url, TESTING=False)

    @public
    def explode() -> str:
        raise RuntimeError("secret internal detail")

    app.add_url_rule("/explode", "explode", explode)
    with caplog.at_level(logging.ERROR):
        response = app.test_client().get("/explode")
    assert response.status_code == 500 and response.mimetype == PROBLEM
    assert response.get_json() == {
        "type": "about:blank", "title": "Internal Server Error", "status": 500,
        "detail": "The server failed to answer; the error has been logged.",
    }
    assert b"secret" not in response.data and b"Traceback" not in response.data
    assert any(r.exc_info and "secret internal detail" in str(r.exc_info[1])
               for r in caplog.records)


def test_in_testing_an_unexpected_error_surfaces(app: Flask) -> None:
    @public
    def explode() -> str:
        raise RuntimeError("boom")

    app.add_url_rule("/explode", "explode", explode)
    with pytest.raises(RuntimeError, match="boom"):
        app.test_client().get("/explode")


def test_a_route_without_a_declared_scope_is_refused(sqlite_url: str) -> None:
    app = build_app(sqlite_url, TESTING=False)
    app.add_url_rule("/forgotten", "forgotten", lambda: "open")
    response = app.test_client().get("/forgotten")
    assert response.status_code == 500 and response.mimetype == PROBLEM


def test_the_database_handle_belongs_to_its_app(sqlite_url: str, tmp_path: Path) -> None:
    first = build_app(sqlite_url)
    second = build_app(f"sqlite:///{tmp_path}/other.db")
    assert get_database(first).engine.url != get_database(second).engine.url
