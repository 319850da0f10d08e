"""The browser harness itself: the watch sees what it must refuse, and passes a
clean page; the served instance answers with its two tokens.

axe-core's rules are its own (tests/browser/vendor, axe-core 4.14.1): the
checks here only show that a violation of "image-alt" (critical) reaches the
findings; what the rule means is axe-core's, no other source.
"""

from __future__ import annotations

import json
import urllib.request
from typing import Any

import pytest

from service.tools.bench.served import Served
from tests.browser.watch import Watched

pytestmark = [pytest.mark.browser, pytest.mark.xdist_group("browser")]

# Pages answered by the browser's own routing, under the server's origin, so
# the harness is proven without depending on any page of the service.
CLEAN = """<!doctype html><html lang="en"><head><meta charset="utf-8">
<title>Harness check</title><link rel="stylesheet" href="/__harness/look.css"></head>
<body><main><h1>Pump station 4</h1><p>Vibration 3.1 mm/s.</p></main></body></html>"""
FAULTY = """<!doctype html><html lang="en"><head><meta charset="utf-8">
<title>Harness fault</title></head><body><main><h1>Faults</h1>
<img src="/__harness/pump.png">
<script src="/__harness/faults.js"></script></main></body></html>"""
FAULTS_JS = """console.error("a planted console error");
fetch("http://localhost:9/elsewhere.json").catch(() => {});"""
STRICT = "default-src 'self'"  # no inline script: axe-core must still run


def _answer_harness_pages(page: Watched) -> None:
    bodies = {"/__harness/clean": (CLEAN, "text/html"),
              "/__harness/faulty": (FAULTY, "text/html"),
              "/__harness/look.css": ("main { max-width: 40rem }", "text/css"),
              "/__harness/faults.js": (FAULTS_JS, "text/javascript"),
              "/__harness/pump.png": ("", "image/png")}

    def fulfil(route: Any) -> None:
        body, kind = bodies[route.request.url.removeprefix(page.origin)]
        # The faulty page has no policy: one would stop its fetch before the watch sees it.
        policy = {} if "faulty" in route.request.url else {"Content-Security-Policy": STRICT}
        route.fulfill(status=200, body=body, content_type=kind, headers=policy)

    page.context.route(f"{page.origin}/__harness/*", fulfil)


def test_a_clean_page_under_a_strict_policy_passes_every_check(browser: Any,
                                                               served: Served) -> None:
    page = Watched(browser, served.origin)
    _answer_harness_pages(page)
    page.goto("/__harness/clean")
    assert page.page.locator("h1").inner_text() == "Pump station 4"
    findings = page.close()
    assert findings.navigations == [f"{served.origin}/__harness/clean"]
    assert findings.problems() == {}


def test_the_watch_reports_other_origins_console_errors_and_violations(
        browser: Any, served: Served) -> None:
    page = Watched(browser, served.origin)
    _answer_harness_pages(page)
    with page.page.expect_request("http://localhost:9/elsewhere.json"):
        page.goto("/__harness/faulty")
    page.page.goto("/__harness/clean")  # never audited
    problems = page.close().problems()
    assert problems["requests to other origins"] == [
        f"{served.origin}/__harness/faulty -> http://localhost:9/elsewhere.json"]
    assert any("a planted console error" in line for line in problems["console errors"])
    assert problems["pages not audited with axe-core"] == [f"{served.origin}/__harness/clean"]
    found = problems["serious or critical axe-core violations"]
    assert [v["id"] for v in found[f"{served.origin}/__harness/faulty"]] == ["image-alt"]


def test_the_served_instance_answers_each_token_with_its_scope(served: Served) -> None:
    def status(token: str, method: str, path: str) -> tuple[int, Any]:
        request = urllib.request.Request(served.origin + path, method=method, headers={
            "Authorization": f"Bearer {token}", "Content-Type": "application/json"},
            data=b"{}" if method == "POST" else None)
        try:
            with urllib.request.urlopen(request, timeout=30) as answer:
                return answer.status, json.loads(answer.read())
        except urllib.error.HTTPError as refused:
            return refused.code, None

    code, versions = status(served.predict_token, "GET", f"/v1/models/{served.model}/versions")
    assert code == 200 and len(versions["versions"]) >= 2
    assert status(served.predict_token, "POST", f"/v1/models/{served.model}/retrain")[0] == 403
