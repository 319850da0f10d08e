"""The handles an app carries: its database (one engine, two session factories)
and its version cache (each model's spec, derived readers and loaded versions).

Bound per app (``app.extensions[...]``), never held in a module global, so
several apps (tests, the demo) can live in one process on different databases.
"""

from __future__ import annotations

from flask import Flask, current_app

from service.store.database import Database, open_database
from service.usecases.drift_reference import ReferenceCache
from service.usecases.drift_tally import DriftTally
from service.versions.cache import VersionCache

EXTENSION_KEY = "keelson.db"
CACHE_KEY = "keelson.version_cache"
REFERENCES_KEY = "keelson.drift_references"
TALLY_KEY = "keelson.drift_tally"


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
        budget_mib=float(app.config["KEELSON_VERSION_CACHE_MIB"]),
    )
    app.extensions[CACHE_KEY] = cache
    return cache


def get_version_cache(app: Flask | None = None) -> VersionCache:
    """The version cache of ``app`` (one per app, shared by its threads)."""
    target = app if app is not None else current_app
    cache: VersionCache = target.extensions[CACHE_KEY]
    return cache


def init_drift(app: Flask) -> None:
    """The app's drift references and, unless ``KEELSON_DRIFT`` is off, its tally
    (whose flush thread starts with the first prediction it counts)."""
    database = get_database(app)
    references = ReferenceCache(database.read)
    app.extensions[REFERENCES_KEY] = references
    app.extensions[TALLY_KEY] = DriftTally(
        database, references, float(app.config["KEELSON_DRIFT_FLUSH_SECONDS"])
    ) if app.config["KEELSON_DRIFT"] else None


def get_drift_references(app: Flask | None = None) -> ReferenceCache:
    target = app if app is not None else current_app
    references: ReferenceCache = target.extensions[REFERENCES_KEY]
    return references


def get_drift_tally(app: Flask | None = None) -> DriftTally | None:
    """The app's drift tally (None when counting is off)."""
    target = app if app is not None else current_app
    tally: DriftTally | None = target.extensions.get(TALLY_KEY)
    return tally


def close_drift_tally(app: Flask) -> None:
    """Stop the app's drift flush thread and write what it counted last."""
    tally = app.extensions.get(TALLY_KEY)
    if tally is not None:
        tally.close()
