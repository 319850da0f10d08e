"""What the browser tests watch on every page: requests to other origins, console
errors and axe-core's accessibility rules.

A ``Watched`` wraps one Playwright page of one browser context. Every request
to an origin other than the server's is recorded and aborted (Keelson runs on
plant networks without internet, so a page must need nothing from elsewhere,
and no test traffic leaves loopback). Every console error and uncaught script
error is recorded with the page it came from. Every document the page
navigates to must be audited with axe-core before the test ends; ``close``
asserts all three.

axe-core (tests/browser/vendor/axe.min.js, MPL-2.0) is injected with
``page.evaluate``, which the DevTools protocol runs outside the page's Content
Security Policy: a strict policy on the page (no inline script) stays in force
for the page's own code and is checked by the console-error rule.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

AXE_SOURCE = (Path(__file__).parent / "vendor" / "axe.min.js").read_text(encoding="utf-8")
# WCAG 2.2 level AA takes in every level A and AA criterion of 2.0, 2.1 and 2.2;
# axe-core files its rules under these tags (axe-core's own rule set, no other).
AXE_TAGS = ["wcag2a", "wcag2aa", "wcag21a", "wcag21aa", "wcag22aa"]
BLOCKING_IMPACTS = {"serious", "critical"}
AXE_RUN = """async (tags) => {
  const result = await axe.run(document, {runOnly: {type: 'tag', values: tags},
                                          resultTypes: ['violations']});
  return result.violations.map(v => ({
    id: v.id, impact: v.impact, help: v.help,
    nodes: v.nodes.slice(0, 5).map(n => n.target.join(' '))}));
}"""


def origin_of(url: str) -> str:
    parts = urlsplit(url)
    return f"{parts.scheme}://{parts.netloc}"


@dataclass
class Findings:
    """What one watched page saw; ``problems`` lists what a test may not leave."""

    other_origins: list[str] = field(default_factory=list)
    console_errors: list[str] = field(default_factory=list)
    navigations: list[str] = field(default_factory=list)
    audited: set[int] = field(default_factory=set)
    violations: dict[str, list[dict[str, Any]]] = field(default_factory=dict)
    expected_errors: list[str] = field(default_factory=list)

    def problems(self) -> dict[str, Any]:
        errors = list(self.console_errors)
        for expected in self.expected_errors:  # each one excuses one line
            excused = next((line for line in errors if line.startswith(expected)), None)
            if excused is not None:
                errors.remove(excused)
        unaudited = [url for index, url in enumerate(self.navigations)
                     if index not in self.audited]
        serious = {url: found for url, found in self.violations.items() if found}
        return {name: value for name, value in (
            ("requests to other origins", self.other_origins),
            ("console errors", errors),
            ("pages not audited with axe-core", unaudited),
            ("serious or critical axe-core violations", serious)) if value}


class Watched:
    """One page in its own browser context, watched as the module docstring says."""

    def __init__(self, browser: Any, origin: str) -> None:
        self.origin = origin
        self.findings = Findings()
        self.context = browser.new_context(base_url=origin, locale="en-GB",
                                           viewport={"width": 1280, "height": 900})
        self.context.route(lambda url: origin_of(url) != origin and
                           urlsplit(url).scheme in ("http", "https", "ws", "wss"),
                           self._refuse_other_origin)
        self.page = self.context.new_page()
        self.page.on("console", self._console)
        self.page.on("pageerror", lambda error: self.findings.console_errors.append(
            f"{self.page.url}: uncaught {error}"))
        self.page.on("framenavigated", self._navigated)
        self.page.on("websocket", lambda socket: self._record_other(socket.url))

    def _record_other(self, url: str) -> None:
        if origin_of(url) != self.origin:
            self.findings.other_origins.append(f"{self.page.url} -> {url}")

    def _refuse_other_origin(self, route: Any) -> None:
        self._record_other(route.request.url)
        route.abort("blockedbyclient")

    def _console(self, message: Any) -> None:
        if message.type == "error":
            self.findings.console_errors.append(f"{self.page.url}: {message.text}")

    def _navigated(self, frame: Any) -> None:
        if frame == self.page.main_frame and frame.url.startswith(("http:", "https:")):
            self.findings.navigations.append(frame.url)

    def audit(self) -> list[dict[str, Any]]:
        """Run axe-core on the document now shown; returns every violation found
        (the serious and critical ones are kept for ``close`` to refuse)."""
        self.page.wait_for_load_state("load")
        if not self.page.evaluate("() => typeof window.axe === 'object'"):
            self.page.evaluate(AXE_SOURCE)
        found: list[dict[str, Any]] = self.page.evaluate(AXE_RUN, AXE_TAGS)
        url = self.page.url
        self.findings.violations.setdefault(url, []).extend(
            v for v in found if v["impact"] in BLOCKING_IMPACTS)
        if self.findings.navigations:
            self.findings.audited.add(len(self.findings.navigations) - 1)
        return found

    def expect_refusal(self, path: str, status: int) -> None:
        """The next answer at ``path`` is meant to be ``status``: Chromium logs
        any such answer as a console error, and this one is the test's point."""
        self.findings.expected_errors.append(
            f"{self.origin}{path}: Failed to load resource: the server responded with a "
            f"status of {status} (")  # then the reason phrase, as the server spelled it

    def goto(self, path: str) -> Any:
        """Open ``path`` on the server and audit it; returns the response."""
        response = self.page.goto(path)
        self.audit()
        return response

    def submit(self, button: Any) -> Any:
        """Click a form's submit ``button``, wait for the document it leads to and
        audit it; returns that document's response."""
        with self.page.expect_navigation() as navigation:
            button.click()
        self.audit()
        return navigation.value

    def close(self) -> Findings:
        self.context.close()
        return self.findings
