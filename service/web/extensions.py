"""The handles an app carries: its database (one engine, two session factories)
and its version cache (each model's spec, derived readers and loaded versions).

Bound per app (``app.extensions[...]``), never held in a module global, so
several apps (tests, the demo) can live in one process on different databases.
"""

from __future__ import annotations

from flask import Flask, current_app

from service.store.database import Database, open_database
from service.versions.cache import VersionCache

EXTENSION_KEY = "keelson.db"
CACHE_KEY = "keelson.version_cache"


def init_database(app: Flask) -> Database:
    database = open_database(app.config["KEELSON_DATABASE_URL"])
    app.extensions[EXTENSION_KEY] = database
    return database


def get_database(app: Flask | None = None) -> Database:
    """The database of ``app`` (default: the current app)."""
    target = app if app is not None else current_app
    database: Database = target.extensions[EXTENSION_KEY]
    return database


def init_version_cache(app: Flask) -> VersionCache:
    # Made with the app, so a bad setting fails create_app, not the first request.
    cache = VersionCache(
        get_database(app).read,
        max_age=float(app.config["KEELSON_ACTIVE_STALENESS_SECONDS"]),
        capacity=int(app.config["KEELSON_VERSION_CACHE_SIZE"]),
    )
    app.extensions[CACHE_KEY] = cache
    return cache


def get_version_cache(app: Flask | None = None) -> VersionCache:
    """The version cache of ``app`` (one per app, shared by its threads)."""
    target = app if app is not None else current_app
    cache: VersionCache = target.extensions[CACHE_KEY]
    return cache
