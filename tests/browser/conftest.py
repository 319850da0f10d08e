"""Fixtures of the browser tests: headless Chromium, a real `keelson serve` with
the trained demo model, and pages watched for other origins, console errors and
accessibility (tests/browser/watch.py).

The browser is Debian's ``chromium`` (/usr/bin/chromium) driven by Playwright's
Python package; Playwright never downloads a browser of its own here. Without
either, the tests skip saying which is missing, unless
``KEELSON_REQUIRE_BROWSER=1`` (CI, .ci/run), where they fail.

One server per database backend for the whole session: SQLite always,
PostgreSQL when ``KEELSON_TEST_DATABASE_URL`` is set (required when
``KEELSON_REQUIRE_POSTGRES=1``). The tests share it, so each leaves the model
as a later test may expect: only the activation test moves a version, and no
test depends on which version is active.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy.engine import make_url

from service.tools.bench.served import Served, prepare, serving
from tests.browser.watch import Watched
from tests.conftest import _admin_execute, _postgres_base_url

CHROMIUM = Path("/usr/bin/chromium")
# Enough train records for four online versions (checkpoint_every 500 of the
# demo spec, 80 % train), so the version tables and curves have several rows.
TRAINING_RECORDS = 2000


def browser_missing() -> str | None:
    """Why the browser tests cannot run here (None: they can)."""
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        return ("Playwright's Python package is missing: pip install -e '.[test]' "
                "(it drives Debian's chromium; no browser download)")
    if not CHROMIUM.exists():
        return f"no Chromium at {CHROMIUM}: apt-get install chromium"
    return None


def require_browser() -> None:
    """Skip saying what is missing, or fail under KEELSON_REQUIRE_BROWSER=1."""
    missing = browser_missing()
    if missing is not None:
        if os.environ.get("KEELSON_REQUIRE_BROWSER") == "1":
            pytest.fail(f"KEELSON_REQUIRE_BROWSER=1 but {missing}")
        pytest.skip(missing)


@pytest.fixture(scope="session")
def browser() -> Iterator[Any]:
    require_browser()
    from playwright.sync_api import sync_playwright

    with sync_playwright() as playwright:
        launched = playwright.chromium.launch(executable_path=str(CHROMIUM), headless=True)
        try:
            yield launched
        finally:
            launched.close()


def _database_url(backend: str, folder: Path) -> Iterator[str]:
    if backend == "sqlite":
        yield f"sqlite:///{folder / 'keelson.db'}"
        return
    base = _postgres_base_url()
    if base is None:
        pytest.skip("PostgreSQL browser tests need KEELSON_TEST_DATABASE_URL")
    name = f"keelson_web_{uuid.uuid4().hex[:10]}"
    _admin_execute(base, f'CREATE DATABASE "{name}"')
    try:
        yield make_url(base).set(database=name).render_as_string(hide_password=False)
    finally:
        _admin_execute(base, f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.fixture(scope="session", params=["sqlite", "postgresql"])
def served(request: pytest.FixtureRequest, browser: Any,
           tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    """The trained demo model behind `keelson serve`, with an admin and a predict
    token (asks for the browser first, so a missing browser skips before training)."""
    folder = tmp_path_factory.mktemp(f"served-{request.param}")
    for url in _database_url(request.param, folder):
        admin, predict = prepare(url, TRAINING_RECORDS, progress=lambda _: None)
        with serving(url, admin, predict, folder) as server:
            yield server


@pytest.fixture
def watch(browser: Any, served: Served) -> Iterator[Callable[[], Watched]]:
    """Opens watched pages (each in a fresh context: its own cookies); at the end
    of the test none of them may have met another origin, a console error, an
    unaudited document or a serious accessibility violation."""
    opened: list[Watched] = []

    def open_page() -> Watched:
        opened.append(Watched(browser, served.origin))
        return opened[-1]

    yield open_page
    problems = {f"page {number}": page.close().problems()
                for number, page in enumerate(opened, start=1)}
    assert {page: found for page, found in problems.items() if found} == {}
