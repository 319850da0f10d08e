"""Fixtures for the service tests: an app on a fresh database, a request
helper that checks the status, and tokens of each scope."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from flask import Flask

from service.web.app import create_app
from service.web.extensions import close_drift_tally, get_database
from tests.service.helpers import ADMIN_TOKEN, ApiClient


def build_app(database_url: str, **overrides: object) -> Flask:
    return create_app(
        {
            "KEELSON_DATABASE_URL": database_url,
            "KEELSON_ADMIN_TOKEN": ADMIN_TOKEN,
            "TESTING": True,
            **overrides,
        }
    )


@pytest.fixture
def app(sqlite_url: str) -> Iterator[Flask]:
    """The app on a fresh SQLite database."""
    application = build_app(sqlite_url)
    yield application
    close_drift_tally(application)  # its last flush, while the database exists
    get_database(application).engine.dispose()


@pytest.fixture
def any_app(database_url: str) -> Iterator[Flask]:
    """The app on a fresh database, once on SQLite and once on PostgreSQL."""
    application = build_app(database_url)
    yield application
    close_drift_tally(application)  # its last flush, while the database exists
    get_database(application).engine.dispose()


@pytest.fixture
def api(app: Flask) -> ApiClient:
    return ApiClient(app)


@pytest.fixture
def any_api(any_app: Flask) -> ApiClient:
    return ApiClient(any_app)
