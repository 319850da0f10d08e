"""Database engines and sessions for SQLite and PostgreSQL, and schema upgrades.

SQLite gets WAL (readers never wait for the writer), foreign keys and a busy
timeout on every connection; PostgreSQL gets pre-ping so a restarted server is
reconnected to instead of surfacing as an error.
"""

from __future__ import annotations

import functools
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.orm import Session, sessionmaker

MIGRATIONS_DIR = Path(__file__).resolve().parent.parent / "migrations"
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


def alembic_config(url: str) -> Any:
    from alembic.config import Config

    config = Config(str(MIGRATIONS_DIR / "alembic.ini"))
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    config.attributes["database_url"] = url
    return config


def upgrade_database(url: str, revision: str = "head") -> None:
    """Apply migrations up to ``revision`` (the only way the schema changes)."""
    from alembic import command

    command.upgrade(alembic_config(url), revision)


@functools.cache
def migration_heads() -> frozenset[str]:
    """The newest revisions shipped with this code (read from disk once per process)."""
    from alembic.script import ScriptDirectory

    return frozenset(ScriptDirectory.from_config(alembic_config("")).get_heads())


def schema_is_current(engine: Engine) -> bool:
    """True when the database stands at the newest migration (one query;
    raises when the database cannot be reached)."""
    from alembic.runtime.migration import MigrationContext

    with engine.connect() as connection:
        current = set(MigrationContext.configure(connection).get_current_heads())
    return current == migration_heads()
