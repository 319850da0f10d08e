"""The pages in headless Chromium against a real `keelson serve`: signing in and
out, the overview, a model's page, making a version serve with a reason, and
what an admin may do that a viewer may not.

Every page is also held to the watch (tests/browser/watch.py): no request to
another origin, no console error, no serious or critical axe-core violation.
Our own contract (docs/http-api.md, "Pages"; the issue's list of browser
checks); no outside source beyond axe-core's rules.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

import pytest

from service.tools.bench.served import ADMIN_TOKEN_NAME, Served
from service.tools.demo import data as demo_data
from tests.browser.pages import active_version, api, history, sign_in
from tests.browser.watch import Watched

pytestmark = [pytest.mark.browser, pytest.mark.xdist_group("browser")]


def test_signing_in_shows_the_overview_and_signing_out_ends_the_session(
        watch: Callable[[], Watched], served: Served) -> None:
    page = watch()
    sign_in(page, served.predict_token)
    row = page.page.locator(f'tr[data-model="{served.model}"]')
    assert row.count() == 1
    assert row.get_by_role("link", name=served.model).get_attribute("href") == \
        f"/models/{served.model}"
    cookie, = (c for c in page.context.cookies() if c["name"] == "keelson_session")
    assert cookie["httpOnly"] and cookie["sameSite"] == "Strict"
    assert served.predict_token not in cookie["value"]

    page.submit(page.page.locator('form[data-action="sign-out"] button[type="submit"]'))
    assert page.page.url == f"{page.origin}/sign-in"
    page.goto("/")  # the old session opens nothing
    assert page.page.url == f"{page.origin}/sign-in"
    assert page.page.locator('form[data-action="sign-out"]').count() == 0


def test_the_model_page_has_a_row_and_a_curve_point_per_version(
        watch: Callable[[], Watched], served: Served) -> None:
    _, listed = api(served, "GET", f"/v1/models/{served.model}/versions")
    numbers = sorted(v["number"] for v in listed["versions"])
    assert len(numbers) >= 2  # the demo's 2,000 records make several versions

    page = watch()
    sign_in(page, served.predict_token)
    page.page.locator(f'tr[data-model="{served.model}"] a').click()
    page.page.wait_for_url(f"{page.origin}/models/{served.model}")
    page.audit()
    rows = page.page.locator("tr[data-version]")
    assert sorted(int(n) for n in rows.evaluate_all(
        "rows => rows.map(r => r.dataset.version)")) == numbers
    statuses = {int(r["number"]): r["status"] for r in listed["versions"]}
    for number in numbers:
        assert page.page.locator(f'tr[data-version="{number}"]').get_attribute(
            "data-status") == statuses[number]
    curve = page.page.locator('[data-chart="learning-curve"]')
    assert curve.get_attribute("data-points") == str(len(numbers))
    assert sorted(json.loads(curve.get_attribute("data-series") or "{}")["version"]) == numbers
    curve.locator("canvas").first.wait_for()  # the script drew it
    fields = {f["name"] for f in demo_data.model_spec()["features"]}
    drift = page.page.locator("[data-drift-field]")
    assert set(drift.evaluate_all("rows => rows.map(r => r.dataset.driftField)")) == fields


def test_an_admin_makes_version_1_serve_with_a_reason_kept_in_its_history(
        watch: Callable[[], Watched], served: Served) -> None:
    if active_version(served) == 1:  # the auto rule kept it: serve another one first
        _, listed = api(served, "GET", f"/v1/models/{served.model}/versions")
        newest = max(v["number"] for v in listed["versions"])
        assert api(served, "POST", f"/v1/models/{served.model}/versions/{newest}/promote",
                   {})[0] == 200
    replaced = active_version(served)
    reason = "Rolling back while station 7's vibration sensor is recalibrated"

    page = watch()
    sign_in(page, served.admin_token)
    page.goto(f"/models/{served.model}")
    form = page.page.locator('form[data-action="activate"][data-version="1"]')
    page.page.locator('tr[data-version="1"] summary').click()  # the form asks, then confirms
    form.locator('[name="reason"]').fill(reason)
    form.locator('[name="confirm"]').check()
    response = page.submit(form.locator('button[type="submit"]'))
    assert response.status == 200
    assert page.page.url.startswith(f"{page.origin}/models/{served.model}")
    assert page.page.locator('tr[data-version="1"]').get_attribute("data-status") == "active"
    assert page.page.locator('tr[data-version="1"] [data-reason]').inner_text() == reason

    assert active_version(served) == 1
    promoted = [e for e in history(served)
                if e["kind"] == "promoted" and e["details"]["version"] == 1]
    assert promoted[-1]["reason"] == reason
    assert promoted[-1]["token"] == ADMIN_TOKEN_NAME
    assert promoted[-1]["details"] == {**promoted[-1]["details"], "automatic": False,
                                       "replaced": replaced}


def test_a_forged_cross_site_post_is_refused_and_changes_nothing(
        browser: Any, watch: Callable[[], Watched], served: Served) -> None:
    page = watch()
    sign_in(page, served.admin_token)
    before = (active_version(served), len(history(served)))
    target = _not_serving(served)
    action = f"/models/{served.model}/versions/{target}/activate"

    # Another site's page, in the signed-in browser, posting to Keelson: localhost
    # and 127.0.0.1 are different sites. The page is answered by the browser itself.
    forger = "http://localhost:" + served.origin.rsplit(":", 1)[1]
    page.context.route(f"{forger}/prize", lambda route: route.fulfill(
        content_type="text/html", body=f"""<!doctype html><html lang="en"><title>Prize</title>
        <main><h1>You won</h1><form method="post" action="{served.origin}{action}">
        <input type="hidden" name="reason" value="x"><input type="hidden" name="confirm"
        value="yes"><button>Claim</button></form></main></html>"""))
    page.page.goto(f"{forger}/prize")
    page.audit()
    page.expect_refusal(action, 403)
    assert page.submit(page.page.get_by_role("button", name="Claim")).status == 403

    # The same site, with the session cookie but without the form's CSRF token.
    forged = page.context.request.post(served.origin + action,
                                       form={"reason": "x", "confirm": "yes"})
    assert forged.status == 403
    assert (active_version(served), len(history(served))) == before


def test_a_predict_session_is_shown_no_action_and_refused_one(
        watch: Callable[[], Watched], served: Served) -> None:
    page = watch()
    sign_in(page, served.predict_token)
    page.goto(f"/models/{served.model}")
    assert page.page.locator("form[data-action]").evaluate_all(
        "forms => forms.map(f => f.dataset.action)") == ["sign-out"]
    before = (active_version(served), len(history(served)))
    target = _not_serving(served)
    action = f"/models/{served.model}/versions/{target}/activate"

    # What a page would send if it showed the form: this session's CSRF token,
    # a reason and the confirmation, posted from this origin.
    page.expect_refusal(action, 403)
    with page.page.expect_navigation() as navigation:
        page.page.evaluate("""([action, csrf]) => {
            const form = document.createElement('form');
            form.method = 'post'; form.action = action;
            for (const [name, value] of [['csrf_token', csrf], ['reason', 'x'],
                                         ['confirm', 'yes']]) {
                const input = document.createElement('input');
                input.type = 'hidden'; input.name = name; input.value = value;
                form.append(input);
            }
            document.body.append(form); form.submit();
        }""", [action, page.page.locator(
            'form[data-action="sign-out"] [name="csrf_token"]').input_value()])
    page.audit()
    assert navigation.value.status == 403
    assert "admin" in page.page.locator("main").inner_text()
    assert (active_version(served), len(history(served))) == before


def _not_serving(served: Served) -> int:
    _, listed = api(served, "GET", f"/v1/models/{served.model}/versions")
    active = active_version(served)
    return min(v["number"] for v in listed["versions"] if v["number"] != active)
