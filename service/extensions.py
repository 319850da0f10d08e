"""The database handle an app carries: one engine and its two session factories.

Bound per app (``app.extensions["keelson.db"]``), never held in a module global,
so several apps (tests, the worker) can live in one process on different
databases.
"""

from __future__ import annotations

from dataclasses import dataclass

from flask import Flask, current_app
from sqlalchemy import Engine
from sqlalchemy.orm import Session, sessionmaker

from service.db import make_engine, make_sessionmaker

EXTENSION_KEY = "keelson.db"


@dataclass(frozen=True)
class Database:
    """``read`` sessions never take a write lock; ``write`` sessions do at BEGIN
    on SQLite (see service.db), so every transaction that writes uses them."""

    engine: Engine
    read: sessionmaker[Session]
    write: sessionmaker[Session]


def init_database(app: Flask) -> Database:
    engine = make_engine(app.config["KEELSON_DATABASE_URL"])
    database = Database(
        engine=engine,
        read=make_sessionmaker(engine),
        write=make_sessionmaker(engine, write=True),
    )
    app.extensions[EXTENSION_KEY] = database
    return database


def get_database(app: Flask | None = None) -> Database:
    """The database of ``app`` (default: the current app)."""
    target = app if app is not None else current_app
    database: Database = target.extensions[EXTENSION_KEY]
    return database
