"""The pages over Flask's test client: signing in and out, the session cookie,
CSRF, what a look-only session may do, and what each page shows (our own
contract, docs/http-api.md "Pages"; no outside source)."""

from __future__ import annotations

import re

import pytest
from flask import Flask
from sqlalchemy import select

from service.store.tables import ModelEventRow, VersionRow
from service.usecases.tokens import revoke_token
from service.web.extensions import get_database
from tests.service.helpers import ADMIN_TOKEN, ApiClient, create_model
from tests.service.page_client import PageClient, csrf_of, served_model


@pytest.fixture
def site(any_api: ApiClient) -> ApiClient:
    """A pump model with version 1 serving and a candidate version 2, on
    SQLite and on PostgreSQL."""
    create_model(any_api)
    served_model(any_api.app)
    return any_api


def test_a_page_without_a_session_sends_to_sign_in(app: Flask) -> None:
    for path in ("/", "/models/pump-risk", "/models/pump-risk/what-if"):
        response = app.test_client().get(path)
        assert response.status_code == 303 and response.headers["Location"] == "/sign-in"


def test_signing_in_and_out(site: ApiClient) -> None:
    pages = PageClient(site.app)
    pages.sign_in(ADMIN_TOKEN)
    overview = pages.get("/").get_data(as_text=True)
    assert 'data-model="pump-risk"' in overview
    assert '<html lang="en">' in overview
    pages.post_form("/", "/sign-out", {})
    assert pages.client.get("/").status_code == 303


def test_an_unknown_token_is_refused(site: ApiClient) -> None:
    page = PageClient(site.app).sign_in("not-a-token", status=401).get_data(as_text=True)
    assert "unknown, revoked" in page


def test_the_cookie_is_signed_http_only_strict_and_holds_no_token(site: ApiClient) -> None:
    response = PageClient(site.app).sign_in(ADMIN_TOKEN)
    (cookie,) = [c for c in response.headers.getlist("Set-Cookie")
                 if c.startswith("keelson_session=")]
    attributes = [part.strip().lower() for part in cookie.split(";")]
    assert "httponly" in attributes and "samesite=strict" in attributes
    assert "secure" not in attributes  # plain HTTP here
    assert ADMIN_TOKEN not in cookie


def test_the_cookie_is_secure_over_https(site: ApiClient) -> None:
    client = site.app.test_client()
    form = client.get("/sign-in", base_url="https://keelson.test")
    response = client.post("/sign-in", base_url="https://keelson.test",
                           data={"token": ADMIN_TOKEN, "csrf_token": csrf_of(form)})
    cookie = [c for c in response.headers.getlist("Set-Cookie")
              if c.startswith("keelson_session=")][0]
    assert "secure" in [part.strip().lower() for part in cookie.split(";")]


def test_a_forged_cookie_is_no_session(site: ApiClient) -> None:
    client = site.app.test_client()
    client.set_cookie("keelson_session", "eyJkIjoiMDAwMCIsIm4iOiJ4In0.Zz.forged")
    assert client.get("/").status_code == 303


def versions_of(app: Flask) -> dict[int, str]:
    with get_database(app).read() as session:
        return dict(session.execute(select(VersionRow.number, VersionRow.status)).all())


@pytest.mark.parametrize("headers, data", [
    ({}, {"csrf_token": "forged"}),
    ({}, {}),
    ({"Origin": "https://elsewhere.example"}, None),
    ({"Sec-Fetch-Site": "cross-site"}, None),
])
def test_a_cross_site_post_is_refused_and_changes_nothing(
        site: ApiClient, headers: dict[str, str], data: dict[str, str] | None) -> None:
    pages = PageClient(site.app)
    pages.sign_in(ADMIN_TOKEN)
    token = csrf_of(pages.get("/models/pump-risk"))
    before = versions_of(site.app)
    form = {"reason": "forged", "confirm": "yes",
            **({"csrf_token": token} if data is None else data)}
    response = pages.client.post("/models/pump-risk/versions/2/activate", data=form,
                                 headers=headers)
    assert response.status_code == 403
    assert versions_of(site.app) == before
    response = pages.client.post("/models/pump-risk/retrains", data=form, headers=headers)
    assert response.status_code == 403


def test_a_sign_in_without_its_csrf_token_is_refused(site: ApiClient) -> None:
    response = site.app.test_client().post("/sign-in", data={"token": ADMIN_TOKEN})
    assert response.status_code == 403


def test_an_admin_makes_a_version_serve_with_a_reason(site: ApiClient) -> None:
    pages = PageClient(site.app)
    pages.sign_in(site.token("admin", name="shift-lead"))
    page = pages.get("/models/pump-risk").get_data(as_text=True)
    assert 'form method="post" action="/models/pump-risk/versions/2/activate" ' \
           'data-action="activate" data-version="2"' in page
    pages.post_form("/models/pump-risk", "/models/pump-risk/versions/2/activate",
                    {"reason": "back to the calmer month", "confirm": "yes"})
    assert site.request("GET", "/v1/models/pump-risk", 200)["active_version"] == 2
    history = site.request("GET", "/v1/models/pump-risk/history", 200)["events"]
    assert history[-1]["kind"] == "promoted" and history[-1]["token"] == "shift-lead"
    assert history[-1]["reason"] == "back to the calmer month"
    page = pages.get("/models/pump-risk").get_data(as_text=True)
    row = re.search(r'<tr data-version="2".*?</tr>', page, re.S).group(0)  # type: ignore[union-attr]
    assert "shift-lead" in row and "back to the calmer month" in row


@pytest.mark.parametrize("form", [{"reason": "", "confirm": "yes"}, {"reason": "why"}])
def test_activating_needs_a_reason_and_the_confirmation(site: ApiClient,
                                                        form: dict[str, str]) -> None:
    pages = PageClient(site.app)
    pages.sign_in(ADMIN_TOKEN)
    pages.post_form("/models/pump-risk", "/models/pump-risk/versions/2/activate", form,
                    status=422)
    assert site.request("GET", "/v1/models/pump-risk", 200)["active_version"] == 1


def test_an_admin_starts_a_retrain(site: ApiClient) -> None:
    pages = PageClient(site.app)
    pages.sign_in(ADMIN_TOKEN)
    assert 'data-action="retrain"' in pages.get("/models/pump-risk").get_data(as_text=True)
    pages.post_form("/models/pump-risk", "/models/pump-risk/retrains", {"reason": "new season"})
    jobs = pages.get("/models/pump-risk/retrains").get_json()["jobs"]
    assert [job["status"] for job in jobs] == ["queued"]
    page = pages.get("/models/pump-risk").get_data(as_text=True)
    assert f'data-job-id="{jobs[0]["id"]}"' in page


def test_a_look_only_session_is_shown_no_action_and_refused_one(site: ApiClient) -> None:
    pages = PageClient(site.app)
    pages.sign_in(site.token("predict", name="planner"))
    page = pages.get("/models/pump-risk").get_data(as_text=True)
    assert 'data-action="activate"' not in page and 'data-action="retrain"' not in page
    token = csrf_of(pages.get("/models/pump-risk"))  # the sign-out form's
    response = pages.client.post("/models/pump-risk/versions/2/activate", data={
        "csrf_token": token, "reason": "try", "confirm": "yes"})
    assert response.status_code == 403
    response = pages.client.post("/models/pump-risk/retrains", data={"csrf_token": token})
    assert response.status_code == 403
    assert site.request("GET", "/v1/models/pump-risk", 200)["active_version"] == 1
    with get_database(site.app).read() as session:
        kinds = list(session.scalars(select(ModelEventRow.kind)))
    assert kinds == ["created"]


def test_an_ingest_token_cannot_sign_in(site: ApiClient) -> None:
    PageClient(site.app).sign_in(site.token("ingest"), status=401)


def test_revoking_the_token_ends_its_sessions(app: Flask, sqlite_url: str) -> None:
    from tests.service.conftest import build_app
    # A token cache of a moment, so the revocation is seen by the next request.
    quick = build_app(sqlite_url, KEELSON_TOKEN_CACHE_SECONDS=1e-9)
    api = ApiClient(quick)
    create_model(api)
    pages = PageClient(quick)
    pages.sign_in(api.token("predict", name="planner"))
    pages.get("/")
    revoke_token(get_database(quick), "planner")
    assert pages.client.get("/").status_code == 303
    get_database(quick).engine.dispose()


def test_a_limited_token_sees_only_its_models(site: ApiClient) -> None:
    create_model(site, name="booster-risk")
    pages = PageClient(site.app)
    pages.sign_in(site.token("admin", name="north", models=["booster-risk"]))
    overview = pages.get("/").get_data(as_text=True)
    assert 'data-model="booster-risk"' in overview and 'data-model="pump-risk"' not in overview
    for path in ("/models/pump-risk", "/models/pump-risk/what-if",
                 "/models/pump-risk/retrains"):
        pages.get(path, status=404)
    token = csrf_of(pages.get("/"))
    response = pages.client.post("/models/pump-risk/versions/2/activate", data={
        "csrf_token": token, "reason": "x", "confirm": "yes"})
    assert response.status_code == 404
    assert site.request("GET", "/v1/models/pump-risk", 200)["active_version"] == 1


def test_pages_carry_a_strict_content_security_policy(site: ApiClient) -> None:
    pages = PageClient(site.app)
    pages.sign_in(ADMIN_TOKEN)
    for path in ("/sign-in", "/", "/models/pump-risk", "/models/pump-risk/what-if"):
        policy = pages.client.get(path).headers["Content-Security-Policy"]
        assert "script-src 'self'" in policy and "default-src 'none'" in policy
        assert "unsafe-inline" not in policy
    page = pages.get("/models/pump-risk").get_data(as_text=True)
    assert not re.search(r"\son[a-z]+=", page)  # no inline event handler
    assert not re.search(r"\sstyle=", page)  # no inline style
    assert not re.search(r'(src|href)="(https?:)?//', page)  # no other origin


def test_the_configured_key_signs_sessions_every_process_accepts(sqlite_url: str) -> None:
    """Two apps (two API processes) with one KEELSON_SECRET_KEY: a session
    made by one is a session for the other; with another key it is not."""
    from tests.service.conftest import build_app
    key = "k" * 40
    first, second = (build_app(sqlite_url, KEELSON_SECRET_KEY=key) for _ in range(2))
    other = build_app(sqlite_url, KEELSON_SECRET_KEY="x" * 40)
    response = PageClient(first).sign_in(ADMIN_TOKEN)
    cookie = [c for c in response.headers.getlist("Set-Cookie")
              if c.startswith("keelson_session=")][0].split(";")[0].split("=", 1)[1]
    for app, status in ((second, 200), (other, 303)):
        client = app.test_client()
        client.set_cookie("keelson_session", cookie)
        assert client.get("/").status_code == status
    for app in (first, second, other):
        get_database(app).engine.dispose()


def test_without_a_configured_key_one_is_kept_in_the_database(sqlite_url: str) -> None:
    from tests.service.conftest import build_app
    first, second = build_app(sqlite_url), build_app(sqlite_url)
    response = PageClient(first).sign_in(ADMIN_TOKEN)
    cookie = [c for c in response.headers.getlist("Set-Cookie")
              if c.startswith("keelson_session=")][0].split(";")[0].split("=", 1)[1]
    client = second.test_client()
    client.set_cookie("keelson_session", cookie)
    assert client.get("/").status_code == 200
    for app in (first, second):
        get_database(app).engine.dispose()


def test_a_short_secret_key_is_refused_at_start() -> None:
    from service.config import ConfigError, load_config
    with pytest.raises(ConfigError):
        load_config({"KEELSON_SECRET_KEY": "short"})


def test_signing_out_ends_every_copy_of_the_session(site: ApiClient) -> None:
    pages = PageClient(site.app)
    response = pages.sign_in(ADMIN_TOKEN)
    cookie = [c for c in response.headers.getlist("Set-Cookie")
              if c.startswith("keelson_session=")][0].split(";")[0].split("=", 1)[1]
    copy = site.app.test_client()
    copy.set_cookie("keelson_session", cookie)
    assert copy.get("/").status_code == 200
    pages.post_form("/", "/sign-out", {})
    assert copy.get("/").status_code == 303  # the copy is refused too
