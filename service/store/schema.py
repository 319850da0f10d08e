"""The schema's version: applying migrations and checking that a database is current.

Alembic (migrations/) is the only way the schema changes; these helpers run it
from code (``keelson db upgrade``, ``keelson serve``, the test fixtures).
"""

from __future__ import annotations

import functools
from pathlib import Path
from typing import Any

from sqlalchemy import Engine

MIGRATIONS_DIR = Path(__file__).resolve().parents[2] / "migrations"


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
