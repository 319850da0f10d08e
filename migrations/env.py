"""Alembic environment: the URL comes from the service's configuration and the
target metadata from the store, never from alembic.ini."""

from __future__ import annotations

from alembic import context

from service.config import read_setting
from service.store.database import make_engine
from service.store.tables import Base

config = context.config
target_metadata = Base.metadata


def database_url() -> str:
    url = config.attributes.get("database_url")
    return url or str(read_setting("KEELSON_DATABASE_URL"))


def run_migrations_offline() -> None:
    context.configure(url=database_url(), target_metadata=target_metadata, literal_binds=True)
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    engine = make_engine(database_url())
    with engine.connect() as connection:
        sqlite = connection.dialect.name == "sqlite"
        if sqlite:
            # Batch mode alters a SQLite table by copying it and dropping the
            # old one; with foreign keys enforced, that drop would run every
            # ON DELETE action pointing at it (models.active_version_id SET
            # NULL, track records CASCADE ...). SQLite's own procedure for
            # altering a table (sqlite.org/lang_altertable.html, "other kinds
            # of table schema changes") turns them off first, outside any
            # transaction, and checks them after.
            connection.connection.driver_connection.execute("PRAGMA foreign_keys=OFF")
        context.configure(
            connection=connection,
            target_metadata=target_metadata,
            render_as_batch=sqlite,
            compare_type=True,
        )
        with context.begin_transaction():
            context.run_migrations()
            if sqlite:
                broken = connection.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
                if broken:
                    raise RuntimeError(f"the migration broke foreign keys: {broken[:5]}")
    engine.dispose()


if context.is_offline_mode():
    run_migrations_offline()
else:
    run_migrations_online()
