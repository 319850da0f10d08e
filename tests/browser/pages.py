"""What the browser tests do often: sign in through the form, and ask the API
directly (the check a page is held to is the API's own answer)."""

from __future__ import annotations

import json
import urllib.error
import urllib.request
from typing import Any

from service.tools.bench.served import Served
from tests.browser.watch import Watched


def sign_in(page: Watched, token: str) -> None:
    """Open the site, get sent to the sign-in form, paste ``token`` and send it."""
    page.goto("/")
    assert page.page.url.endswith("/sign-in")
    page.page.get_by_label("Token").fill(token)
    response = page.submit(page.page.get_by_role("button", name="Sign in"))
    assert response.status == 200 and page.page.url == f"{page.origin}/"


def api(served: Served, method: str, path: str, body: Any = None,
        token: str | None = None) -> tuple[int, Any]:
    """One API call with a bearer token (the admin's unless given): status, JSON."""
    request = urllib.request.Request(
        served.origin + path, method=method,
        data=None if body is None else json.dumps(body).encode(),
        headers={"Authorization": f"Bearer {token or served.admin_token}",
                 "Content-Type": "application/json"})
    try:
        with urllib.request.urlopen(request, timeout=60) as answer:
            return answer.status, json.loads(answer.read())
    except urllib.error.HTTPError as refused:
        return refused.code, json.loads(refused.read() or b"null")


def history(served: Served) -> list[dict[str, Any]]:
    """Every event of the model's history, following its pages."""
    events: list[dict[str, Any]] = []
    path = f"/v1/models/{served.model}/history"
    while True:
        status, page = api(served, "GET", path)
        assert status == 200, page
        events += page["events"]
        if page.get("next") is None:
            return events
        path = f"/v1/models/{served.model}/history?after={page['next']}"


def active_version(served: Served) -> int:
    status, model = api(served, "GET", f"/v1/models/{served.model}")
    assert status == 200, model
    return int(model["active_version"])
