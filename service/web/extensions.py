"""The handles an app carries: its database (one engine, two session factories).

Bound per app (``app.extensions["keelson.db"]``), never held in a module global,
so several apps (tests, the demo) can live in one process on different databases.
"""

from __future__ import annotations

from flask import Flask, current_app

from service.store.database import Database, open_database

EXTENSION_KEY = "keelson.db"


def init_database(app: Flask) -> Database:
    database = open_database(app.config["KEELSON_DATABASE_URL"])
    app.extensions[EXTENSION_KEY] = database
    return database


def get_database(app: Flask | None = None) -> Database:
    """The database of ``app`` (default: the current app)."""
    target = app if app is not None else current_app
    database: Database = target.extensions[EXTENSION_KEY]
    return database
