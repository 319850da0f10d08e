"""A scratch PostgreSQL database for a benchmark run, dropped afterwards."""

from __future__ import annotations

import contextlib
import uuid
from collections.abc import Iterator


@contextlib.contextmanager
def scratch_postgres(base_url: str) -> Iterator[str]:
    """A new empty database on the server of ``base_url``, dropped afterwards."""
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    name = f"keelson_bench_{uuid.uuid4().hex[:10]}"
    admin = create_engine(make_url(base_url).set(database="postgres"),
                          isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as connection:
            connection.execute(text(f'CREATE DATABASE "{name}"'))
        yield make_url(base_url).set(database=name).render_as_string(hide_password=False)
    finally:
        with admin.connect() as connection:
            connection.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()
