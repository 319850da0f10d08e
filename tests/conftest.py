"""Database fixtures shared by every test group.

Every database is built with ``alembic upgrade head`` (never ``create_all``):
once per session into a template, then copied per test (a file copy on SQLite,
``CREATE DATABASE ... TEMPLATE`` on PostgreSQL), so each test starts empty and
every run exercises the migrations.

PostgreSQL tests need ``KEELSON_TEST_DATABASE_URL`` (any database on the server
to use); without it they skip, unless ``KEELSON_REQUIRE_POSTGRES=1`` (CI), where
they fail.
"""

from __future__ import annotations

import os
import shutil
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

from service.store.schema import upgrade_database

BACKENDS = ["sqlite", "postgresql"]


def _postgres_base_url() -> str | None:
    url = os.environ.get("KEELSON_TEST_DATABASE_URL")
    if url:
        return url
    if os.environ.get("KEELSON_REQUIRE_POSTGRES") == "1":
        pytest.fail("KEELSON_REQUIRE_POSTGRES=1 but KEELSON_TEST_DATABASE_URL is not set")
    return None


def _admin_execute(base_url: str, sql: str) -> None:
    admin = create_engine(
        make_url(base_url).set(database="postgres"), isolation_level="AUTOCOMMIT"
    )
    try:
        with admin.connect() as connection:
            connection.execute(text(sql))
    finally:
        admin.dispose()


@pytest.fixture(scope="session")
def sqlite_template(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("template") / "template.db"
    upgrade_database(f"sqlite:///{path}")
    return path


@pytest.fixture(scope="session")
def postgres_template() -> Iterator[str | None]:
    base = _postgres_base_url()
    if base is None:
        yield None
        return
    name = f"keelson_tpl_{uuid.uuid4().hex[:10]}"
    _admin_execute(base, f'CREATE DATABASE "{name}"')
    url = make_url(base).set(database=name).render_as_string(hide_password=False)
    upgrade_database(url)
    yield name
    _admin_execute(base, f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.fixture
def sqlite_url(sqlite_template: Path, tmp_path: Path) -> str:
    """A fresh, migrated SQLite database file."""
    path = tmp_path / "keelson.db"
    shutil.copyfile(sqlite_template, path)
    return f"sqlite:///{path}"


@pytest.fixture
def postgres_url(postgres_template: str | None) -> Iterator[str]:
    """A fresh, migrated PostgreSQL database (skips without a server configured)."""
    base = _postgres_base_url()
    if base is None or postgres_template is None:
        pytest.skip("KEELSON_TEST_DATABASE_URL is not set")
    name = f"keelson_t_{uuid.uuid4().hex[:12]}"
    _admin_execute(base, f'CREATE DATABASE "{name}" TEMPLATE "{postgres_template}"')
    yield make_url(base).set(database=name).render_as_string(hide_password=False)
    _admin_execute(base, f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.fixture(params=BACKENDS)
def database_url(request: pytest.FixtureRequest) -> str:
    """Each test that takes this runs once on SQLite and once on PostgreSQL."""
    fixture = "sqlite_url" if request.param == "sqlite" else "postgres_url"
    return str(request.getfixturevalue(fixture))
