"""Scratch databases for a benchmark run, dropped afterwards."""

from __future__ import annotations

import contextlib
import tempfile
import uuid
from collections.abc import Callable, Iterator
from typing import Any

SKIPPED_POSTGRES = {"skipped": "no postgres_url (or KEELSON_BENCH_POSTGRES_URL)"}


def on_each_database(measure: Callable[[str], dict[str, Any]], postgres_url: str | None,
                     *, sqlite: bool = True) -> dict[str, dict[str, Any]]:
    """``measure(url)`` on a scratch SQLite file and, given a server, on a
    scratch PostgreSQL database: the figures by backend ("sqlite",
    "postgresql"; the latter says it was skipped when no server was given)."""
    figures: dict[str, dict[str, Any]] = {}
    if sqlite:
        with tempfile.TemporaryDirectory(prefix="keelson-bench-") as scratch:
            figures["sqlite"] = measure(f"sqlite:///{scratch}/bench.db")
    if postgres_url:
        with scratch_postgres(postgres_url) as url:
            figures["postgresql"] = measure(url)
    else:
        figures["postgresql"] = dict(SKIPPED_POSTGRES)
    return figures


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
