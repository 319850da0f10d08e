"""Database engines and sessions for SQLite and PostgreSQL.

SQLite gets WAL (readers never wait for the writer), foreign keys and a busy
timeout on every connection; PostgreSQL gets pre-ping so a restarted server is
reconnected to instead of surfacing as an error.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session, sessionmaker

SQLITE_BUSY_TIMEOUT_MS = 30_000


def is_sqlite(url: str) -> bool:
    return make_url(url).get_backend_name() == "sqlite"


def make_engine(url: str, **kwargs: Any) -> Engine:
    """An Engine for ``url`` with the per-backend settings Keelson relies on."""
    if is_sqlite(url):
        database = make_url(url).database
        if database and database != ":memory:":
            Path(database).parent.mkdir(parents=True, exist_ok=True)
        engine = create_engine(
            url, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_MS / 1000}, **kwargs
        )
        event.listen(engine, "connect", _sqlite_pragmas)
        event.listen(engine, "begin", _sqlite_begin)
        return engine
    kwargs.setdefault("pool_pre_ping", True)
    return create_engine(url, **kwargs)


def _sqlite_pragmas(dbapi_connection: Any, _record: Any) -> None:
    dbapi_connection.isolation_level = None  # we emit BEGIN ourselves
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA journal_mode=WAL")
    cursor.execute("PRAGMA foreign_keys=ON")
    cursor.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_MS}")
    cursor.execute("PRAGMA synchronous=NORMAL")
    cursor.close()


def _sqlite_begin(connection: Any) -> None:
    # A deferred transaction that reads and then writes fails at once with
    # "database is locked" when another writer committed in between (WAL
    # snapshot conflict; the busy timeout does not apply). Writers therefore
    # take the write lock up front with BEGIN IMMEDIATE and queue on the busy
    # timeout; readers stay deferred so they never wait for a writer.
    if connection.get_execution_options().get("sqlite_write"):
        connection.exec_driver_sql("BEGIN IMMEDIATE")
    else:
        connection.exec_driver_sql("BEGIN")


def make_sessionmaker(engine: Engine, *, write: bool = False) -> sessionmaker[Session]:
    """Sessions on ``engine``; ``write=True`` for transactions that will write
    (on SQLite they take the write lock at BEGIN; elsewhere it changes nothing)."""
    if write:
        engine = engine.execution_options(sqlite_write=True)
    return sessionmaker(engine, expire_on_commit=False)


def refresh_planner_statistics(engine: Engine, table: str) -> None:
    """``ANALYZE table`` on PostgreSQL (after a bulk load); nothing elsewhere.

    SQLite's planner uses the (model_id, seq) index without statistics."""
    if engine.dialect.name != "postgresql":
        return
    with engine.begin() as connection:
        connection.exec_driver_sql(f'ANALYZE "{table}"')


@dataclass(frozen=True)
class Database:
    """One engine and its two session factories. ``read`` sessions never take a
    write lock; ``write`` sessions do at BEGIN on SQLite (see ``_sqlite_begin``),
    so every transaction that writes uses them."""

    engine: Engine
    read: sessionmaker[Session]
    write: sessionmaker[Session]


def open_database(url: str, **kwargs: Any) -> Database:
    """The engine for ``url`` and its read and write session factories."""
    engine = make_engine(url, **kwargs)
    return Database(engine=engine, read=make_sessionmaker(engine),
                    write=make_sessionmaker(engine, write=True))


@contextmanager
def transaction(sessions: sessionmaker[Session]) -> Iterator[Session]:
    """A session in one transaction: committed when the block ends, rolled back
    (and the error re-raised) when it raises. Use a write factory to write."""
    with sessions() as session, session.begin():
        yield session
