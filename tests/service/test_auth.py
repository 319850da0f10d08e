"""Bearer tokens (RFC 6750) on every route: an auth matrix over the app's own
URL map, each route held to the scope docs/http-api.md gives it (our own
contract, read by tests/contract.py), never to the scope its view declares; so
a route that declares the wrong scope fails here, and a route added later is
covered without editing this."""

from __future__ import annotations

import hashlib
import re
from collections.abc import Iterator

import pytest
from flask import Flask
from sqlalchemy import select

from service.errors import InvalidInputError, NotFoundError
from service.store.tables import TokenRow
from service.usecases.tokens import create_token, list_tokens, revoke_token
from service.web.auth import SCOPES, declared_scope
from service.web.extensions import get_database
from tests.contract import NO_TOKEN, PAGE_SCOPES, documented_scopes, is_page, route_key
from tests.service.conftest import build_app
from tests.service.helpers import ApiClient, create_model

PATH_VALUES = {"name": "pump-risk", "number": "1", "job_id": "1", "id": "1"}
# A token holding every scope but the one a route needs (so every lower one).
WRONG = {"admin": ("ingest", "predict"), "ingest": ("predict",), "predict": ("ingest",)}


def app_routes(app: Flask) -> Iterator[tuple[str, str, str]]:
    """(method, rule, concrete path) for every route of the app."""
    for rule in app.url_map.iter_rules():
        path = re.sub(
            r"<(?:[^:<>]+:)?([^<>]+)>", lambda m: PATH_VALUES.get(m.group(1), "x"), rule.rule
        )
        for method in sorted((rule.methods or set()) - {"HEAD", "OPTIONS"}):
            yield method, rule.rule, path


def routes(app: Flask) -> Iterator[tuple[str, str, str]]:
    """(method, concrete path, documented scope) for every route of the API;
    the pages take a session, not a bearer token (tests/service/test_pages*.py
    and test_page_routes below)."""
    table = documented_scopes()
    for method, rule, path in app_routes(app):
        scope = table[route_key(method, rule)]
        if not is_page(scope):
            yield method, path, scope


def test_every_route_is_in_the_scope_table_and_every_row_is_a_route(app: Flask) -> None:
    served = {route_key(method, rule) for method, rule, _ in app_routes(app)}
    table = documented_scopes()
    assert sorted(served - set(table)) == []  # served, but no documented scope
    assert sorted(set(table) - served) == []  # documented, but not served
    assert len(served) >= 16
    assert set(table.values()) <= {NO_TOKEN, *SCOPES, *PAGE_SCOPES}


def test_the_openapi_document_states_the_documented_scopes(api: ApiClient) -> None:
    """Each operation's ``x-scope`` and ``security`` (OpenAPI 3.0 Security
    Requirement Object: an empty list is no authentication) say what the table says."""
    doc = api.request("GET", "/openapi.json", 200, token=None)
    stated = {}
    for template, operations in doc["paths"].items():
        for method, operation in operations.items():
            if method == "parameters":  # shared by the path's operations, not one
                continue
            needs = operation.get("x-scope", NO_TOKEN)
            assert (needs == NO_TOKEN) == (operation["security"] == []), (method, template)
            stated[route_key(method.upper(), template)] = needs
    table = documented_scopes()
    # /metrics is served beside the API, the pages are HTML: neither is in it.
    assert stated == {key: scope for key, scope in table.items()
                      if key[1] != "/metrics" and not is_page(scope)}


@pytest.fixture
def matrix_api(api: ApiClient) -> ApiClient:
    create_model(api)
    return api


def test_every_route_declares_a_scope(app: Flask) -> None:
    """Fail closed needs a declaration on every view; whether it is the right one
    is the auth matrix's question."""
    undeclared = [rule.rule for rule in app.url_map.iter_rules()
                  if declared_scope(app.view_functions[rule.endpoint]) is None]
    assert undeclared == []


def test_the_public_routes_are_exactly_the_contracts() -> None:
    public = {path for (_, path), scope in documented_scopes().items() if scope == NO_TOKEN}
    assert public == {"/healthz", "/readyz", "/metrics", "/openapi.json"}


def test_the_auth_matrix(matrix_api: ApiClient, app: Flask) -> None:
    api = matrix_api
    tokens = {scope: api.token(*WRONG[scope], name=f"not-{scope}") for scope in WRONG}
    right = {scope: api.token(scope, name=scope) for scope in SCOPES}
    checked = 0
    for method, path, scope in routes(app):
        if scope == NO_TOKEN:
            response = api.client.open(path, method=method)
            assert response.status_code not in (401, 403), (method, path)
            continue
        # No token: 401 with a Bearer challenge (RFC 6750 section 3).
        response = api.client.open(path, method=method)
        assert response.status_code == 401, (method, path)
        assert response.headers["WWW-Authenticate"].startswith("Bearer ")
        assert response.mimetype == "application/problem+json"
        # A token nobody issued: 401, error="invalid_token".
        response = api.client.open(path, method=method,
                                   headers={"Authorization": "Bearer not-a-token"})
        assert response.status_code == 401, (method, path)
        assert 'error="invalid_token"' in response.headers["WWW-Authenticate"]
        # Every scope but the needed one: 403 naming the scope.
        response = api.client.open(path, method=method,
                                   headers={"Authorization": f"Bearer {tokens[scope]}"})
        assert response.status_code == 403, (method, path)
        assert response.get_json()["detail"] == f"This token lacks the {scope!r} scope."
        # The right scope, and admin: past the gate (whatever the view then says).
        for token in (right[scope], right["admin"]):
            response = api.client.open(path, method=method, json={},
                                       headers={"Authorization": f"Bearer {token}"})
            assert response.status_code not in (401, 403), (method, path, response.data)
        checked += 1
    assert checked >= 8


def test_the_scheme_name_is_case_insensitive(matrix_api: ApiClient) -> None:
    token = matrix_api.token("predict")
    response = matrix_api.client.get("/v1/models", headers={"Authorization": f"bearer {token}"})
    assert response.status_code == 200


@pytest.mark.parametrize("header", ["", "Bearer", "Bearer ", "Basic dXNlcjpwYXNz", "Token x"])
def test_a_malformed_authorization_header_is_401(matrix_api: ApiClient, header: str) -> None:
    response = matrix_api.client.get("/v1/models", headers={"Authorization": header})
    assert response.status_code == 401
    assert response.headers["WWW-Authenticate"] == 'Bearer realm="keelson"'


def test_tokens_are_stored_only_as_their_sha256(app: Flask) -> None:
    row, plaintext = create_token(get_database(app), "ingester", ["ingest"])
    with get_database(app).read() as session:
        stored = session.scalars(select(TokenRow)).one()
    # FIPS 180-4 SHA-256 of the token's UTF-8 bytes, hex (docs/http-api.md), as the
    # standard library's hashlib computes it, not as our own hash_token does.
    assert stored.token_hash == hashlib.sha256(plaintext.encode()).hexdigest()
    assert row.token_hash == stored.token_hash
    assert len(stored.token_hash) == 64 and plaintext not in stored.token_hash
    assert stored.scopes == ["ingest"]
    assert len(plaintext) >= 40


def test_a_revoked_token_is_refused(sqlite_url: str) -> None:
    app = build_app(sqlite_url, KEELSON_TOKEN_CACHE_SECONDS=1e-9)
    api = ApiClient(app)
    token = api.token("predict", name="reader")
    api.request("GET", "/v1/models", 200, token=token)
    revoked = revoke_token(get_database(app), "reader")
    assert [r.name for r in revoked] == ["reader"] and revoked[0].revoked_at is not None
    body = api.request("GET", "/v1/models", 401, token=token)
    assert body["detail"] == "The bearer token is unknown or revoked."


def test_token_use_cases_list_revoke_by_id_and_refuse_nonsense(app: Flask) -> None:
    db = get_database(app)
    first, _ = create_token(db, "a", ["predict", "ingest", "predict"])
    create_token(db, "b", ["admin"])
    assert first.scopes == ["ingest", "predict"]
    assert [t.name for t in list_tokens(db)] == ["a", "b"]
    assert [t.id for t in revoke_token(db, first.id)] == [first.id]
    with pytest.raises(NotFoundError):
        revoke_token(db, first.id)
    with pytest.raises(InvalidInputError) as bad:
        create_token(db, "", ["root"])
    assert set(bad.value.errors or {}) == {"name", "scopes"}
    with pytest.raises(InvalidInputError):
        create_token(db, "none", [])


def test_the_environment_admin_token_holds_every_scope(sqlite_url: str) -> None:
    app = build_app(sqlite_url, KEELSON_ADMIN_TOKEN="from-the-environment")
    api = ApiClient(app)
    api.request("POST", "/v1/models", 201, token="from-the-environment",
                json_body={"name": "x", "task": "regression", "target": "y",
                           "features": [{"name": "a", "type": "numeric"}]})
    api.request("GET", "/v1/models/x", 200, token="from-the-environment")
    api.request("POST", "/v1/models/x/records", 201, token="from-the-environment",
                json_body={"records": [{"features": {"a": 1}, "label": 2}]})


def test_without_an_environment_token_an_empty_bearer_never_passes(sqlite_url: str) -> None:
    app = build_app(sqlite_url, KEELSON_ADMIN_TOKEN="")
    api = ApiClient(app)
    api.request("GET", "/v1/models", 401, token="")
    api.request("GET", "/v1/models", 401, token="None")


PAGE_NEEDS = {"page: none": "open", "page: predict": "look", "page: admin": "act"}


def test_page_routes_declare_the_documented_need(app: Flask) -> None:
    """Each page view declares the need (service/web/pages/guard.py) the
    scope table gives its route, and a page route is nothing else."""
    from service.web.pages.guard import NEEDS
    table = documented_scopes()
    pages = 0
    for method, rule, _ in app_routes(app):
        scope = table[route_key(method, rule)]
        view = app.view_functions[next(r.endpoint for r in app.url_map.iter_rules()
                                       if r.rule == rule and method in (r.methods or ()))]
        if is_page(scope):
            pages += 1
            assert getattr(view, NEEDS, None) == PAGE_NEEDS[scope], (method, rule)
        else:
            assert getattr(view, NEEDS, None) is None, (method, rule)
    assert pages >= 10


def test_the_page_matrix(matrix_api: ApiClient, app: Flask) -> None:
    """Without a session a page sends to the sign-in form (GET) or is refused
    (POST, 403: no CSRF token can match); with a look-only session an acting
    form is refused with 403 even with its CSRF token."""
    from tests.service.page_client import PageClient, csrf_of
    table = documented_scopes()
    looker = PageClient(app)
    looker.sign_in(matrix_api.token("predict", name="looker"))
    token = csrf_of(looker.get("/"))
    checked = 0
    for method, rule, path in app_routes(app):
        scope = table[route_key(method, rule)]
        if not is_page(scope) or scope == "page: none":
            continue
        response = app.test_client().open(path, method=method)
        if method == "GET":
            assert response.status_code == 303, (method, path)
            assert response.headers["Location"] == "/sign-in"
        else:
            assert response.status_code == 403, (method, path)
        if scope == "page: admin":
            response = looker.client.open(path, method=method, data={
                "csrf_token": token, "reason": "r", "confirm": "yes"})
            assert response.status_code == 403, (method, path)
        checked += 1
    assert checked >= 7
