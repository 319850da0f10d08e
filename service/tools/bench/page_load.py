"""`keelson bench page-load`: the model page in headless Chromium, and the
README's screenshots made by the same browser.

The whole demo (`keelson demo`: online versions, a retrain, scored cases with
outcomes and a drifted field) is loaded into a scratch SQLite database and
served by a real `keelson serve` on loopback (service/tools/bench/served.py).
Debian's chromium, driven by Playwright (a test extra: `pip install -e
'.[test]'`), signs in through the form, then opens the model page in a fresh
browser context per run, so each load starts with an empty cache:
- the time to the load event (`loadEventStart` of the navigation timing entry,
  from the start of the navigation), median and slowest, against 1 s;
- a second load in the same context (the assets cached as the server allows);
- the JavaScript and CSS the page takes, in bytes as served, against 250 KB.
"""

from __future__ import annotations

import statistics
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

from service.tools.bench.served import Served, prepare, serving
from service.tools.demo import data as demo_data

CHROMIUM = "/usr/bin/chromium"
LOAD_TARGET_MS = 1000.0
ASSET_TARGET_BYTES = 250 * 1024
VIEWPORT = {"width": 1280, "height": 900}
LOAD_EVENT = """() => {
  const [entry] = performance.getEntriesByType('navigation');
  return entry.loadEventStart - entry.startTime;
}"""


def run_page_load_bench(*, runs: int, records: int, screenshots: Path | None,
                        chromium: str, progress: Callable[[str], None]) -> dict[str, Any]:
    try:
        from playwright.sync_api import sync_playwright
    except ImportError as missing:
        raise RuntimeError("keelson bench page-load needs Playwright: pip install -e "
                           "'.[test]' (it drives Debian's chromium; no browser download)"
                           ) from missing
    if not Path(chromium).exists():
        raise RuntimeError(f"no Chromium at {chromium}: apt-get install chromium")
    with tempfile.TemporaryDirectory(prefix="keelson-page-load-") as scratch:
        folder = Path(scratch)
        url = f"sqlite:///{folder / 'keelson.db'}"
        progress(f"loading the demo ({records} records) into {url}")
        admin, predict = prepare(url, records, progress, full_demo=True)
        with serving(url, admin, predict, folder) as served, sync_playwright() as driver:
            browser = driver.chromium.launch(executable_path=chromium, headless=True)
            try:
                signed_in = _sign_in(browser, served)
                progress(f"measuring the model page, {runs} cold loads")
                figures = _measure(browser, served, signed_in, runs)
                if screenshots is not None:
                    figures["screenshots"] = _screenshots(browser, served, signed_in,
                                                          screenshots)
            finally:
                browser.close()
    return figures


def _sign_in(browser: Any, served: Served) -> Any:
    """The admin's signed-in cookies, got through the sign-in form."""
    context = browser.new_context(base_url=served.origin)
    page = context.new_page()
    page.goto("/sign-in")
    page.get_by_label("Token").fill(served.admin_token)
    with page.expect_navigation():
        page.get_by_role("button", name="Sign in").click()
    if page.url != f"{served.origin}/":
        raise RuntimeError(f"signing in ended on {page.url}, not the overview")
    state = context.storage_state()
    context.close()
    return state


def _measure(browser: Any, served: Served, signed_in: Any, runs: int) -> dict[str, Any]:
    path = f"/models/{served.model}"
    cold: list[float] = []
    warm: list[float] = []
    assets: dict[str, int] = {}
    for run in range(runs):
        context = browser.new_context(base_url=served.origin, storage_state=signed_in,
                                      viewport=VIEWPORT)
        page = context.new_page()
        shipped: dict[str, int] = {}
        if run == 0:
            page.on("response", lambda response, into=shipped: _count_asset(response, into))
        answer = page.goto(path, wait_until="load")
        if answer is None or answer.status != 200:
            raise RuntimeError(f"{path} answered {None if answer is None else answer.status}")
        cold.append(float(page.evaluate(LOAD_EVENT)))
        page.goto(path, wait_until="load")
        warm.append(float(page.evaluate(LOAD_EVENT)))
        if run == 0:
            assets = dict(shipped)
        context.close()
    total = sum(assets.values())
    return {
        "page": path,
        "runs": runs,
        "load_event_ms": {"cold_median": round(statistics.median(cold), 1),
                          "cold_max": round(max(cold), 1),
                          "warm_median": round(statistics.median(warm), 1),
                          "cold_runs": [round(ms, 1) for ms in cold],
                          "target": LOAD_TARGET_MS,
                          "met": max(cold) <= LOAD_TARGET_MS},
        "js_css_bytes": {"total": total, "files": assets, "target": ASSET_TARGET_BYTES,
                         "met": total <= ASSET_TARGET_BYTES},
    }


def _count_asset(response: Any, into: dict[str, int]) -> None:
    if response.request.resource_type in ("script", "stylesheet"):
        into[response.url.rsplit("/", 1)[-1]] = len(response.body())


def _screenshots(browser: Any, served: Served, signed_in: Any, folder: Path) -> list[str]:
    """The overview, the model page and a scored what-if, as whole-page PNGs."""
    folder.mkdir(parents=True, exist_ok=True)
    context = browser.new_context(base_url=served.origin, storage_state=signed_in,
                                  viewport=VIEWPORT, device_scale_factor=1)
    page = context.new_page()
    case = {k: str(v).lower() if isinstance(v, bool) else str(v)
            for k, v in demo_data.SHOWCASE[0][1].items()}
    query = "&".join(f"{k}={v}" for k, v in case.items() if v != "false")
    shots = [("overview.png", "/", None),
             ("model.png", f"/models/{served.model}", '[data-chart="learning-curve"] canvas'),
             ("what-if.png", f"/models/{served.model}/what-if?{query}&show=1",
              "[data-sweep-field] canvas")]
    made = []
    for name, path, drawn in shots:
        page.goto(path, wait_until="load")
        if drawn is not None:
            page.locator(drawn).first.wait_for()
        page.screenshot(path=str(folder / name), full_page=True)
        made.append(str(folder / name))
    context.close()
    return made
