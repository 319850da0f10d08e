"""Ingest throughput in process: POST 1,000-record batches through the Flask
test client, beside a raw bulk insert of the same rows, on SQLite and (with
``--postgres-url``) PostgreSQL.

Run: ``.venv/bin/python -m tests.benchmarks.ingest_client [--batches N]
[--postgres-url postgresql+psycopg://postgres@127.0.0.1:5432/postgres]``

No sockets and no server: it isolates what the app spends per batch (parse,
validate, dedupe, insert, commit). Wall time and this process's CPU time are
both reported; on a machine shared with other work the CPU figure is the
steadier one (on PostgreSQL it leaves out the server's own work). The raw
insert is the driver alone: sqlite3 ``executemany``, psycopg ``COPY``. Not a
test: nothing here asserts, and the suite does not collect it.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import sqlite3
import tempfile
import time
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import psycopg
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

from service.store.schema import upgrade_database
from service.web.app import create_app
from service.web.extensions import get_database
from tests.service.helpers import ADMIN_TOKEN, ApiClient, create_model, record

BATCH = 1_000
RECORDS = "/v1/models/pump-risk/records"
COLUMNS = "model_id, key, features, label, split, received_at"


def timed(run: Callable[[], None], count: int) -> dict[str, float]:
    wall, cpu = time.perf_counter(), time.process_time()
    run()
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    return {"records_per_s_wall": round(count / wall), "records_per_s_cpu": round(count / cpu)}


def through_api(url: str, batches: int) -> dict[str, float]:
    upgrade_database(url)
    app = create_app({"KEELSON_DATABASE_URL": url, "KEELSON_ADMIN_TOKEN": ADMIN_TOKEN})
    create_model(ApiClient(app))
    bodies = [json.dumps({"records": [record(i, key=f"b{b}-{i}") for i in range(BATCH)]})
              for b in range(batches + 1)]
    client = app.test_client()
    headers = {"Authorization": f"Bearer {ADMIN_TOKEN}"}

    def post(body: str) -> None:
        response = client.post(RECORDS, data=body, content_type="application/json",
                               headers=headers)
        assert response.status_code == 201, response.data

    def post_all() -> None:
        for body in bodies[1:]:
            post(body)

    post(bodies[0])  # warm: schema built, connections open
    try:
        return timed(post_all, batches * BATCH)
    finally:
        get_database(app).engine.dispose()


def raw_rows(batch: int) -> list[tuple[Any, ...]]:
    now = dt.datetime.now(dt.UTC)
    return [(1, f"b{batch}-{i}", json.dumps(record(i)["features"]),
             json.dumps(record(i)["label"]), "train", now) for i in range(BATCH)]


def raw_insert(url: str, batches: int) -> dict[str, float]:
    upgrade_database(url)
    data = [raw_rows(b) for b in range(batches)]
    model = ("INSERT INTO models (name, spec, records_train, records_holdout, created_at) "
             "VALUES ('m', '{}', 0, 0, '2026-01-01')")
    if make_url(url).get_backend_name() == "sqlite":
        connection = sqlite3.connect(str(make_url(url).database), isolation_level=None)
        connection.execute("PRAGMA journal_mode=WAL")
        connection.execute("PRAGMA synchronous=NORMAL")
        connection.execute(model)
        sql = f"INSERT INTO records ({COLUMNS}) VALUES (?, ?, ?, ?, ?, ?)"

        def run_sqlite() -> None:
            for rows in data:
                connection.execute("BEGIN IMMEDIATE")
                connection.executemany(sql, [(*r[:5], r[5].isoformat()) for r in rows])
                connection.execute("COMMIT")

        return timed(run_sqlite, batches * BATCH)
    dsn = make_url(url).set(drivername="postgresql").render_as_string(hide_password=False)
    with psycopg.connect(dsn) as pg:
        pg.execute(model)
        pg.commit()

        def run_postgres() -> None:
            for rows in data:
                with pg.cursor() as cursor, cursor.copy(
                    f"COPY records ({COLUMNS}) FROM STDIN"
                ) as copy:
                    for row in rows:
                        copy.write_row(row)
                pg.commit()

        return timed(run_postgres, batches * BATCH)


@contextmanager
def scratch_postgres(base: str) -> Iterator[Callable[[], str]]:
    admin = create_engine(make_url(base).set(database="postgres"), isolation_level="AUTOCOMMIT")
    made: list[str] = []

    def new() -> str:
        name = f"keelson_bench_{uuid.uuid4().hex[:10]}"
        with admin.connect() as connection:
            connection.execute(text(f'CREATE DATABASE "{name}"'))
        made.append(name)
        return make_url(base).set(database=name).render_as_string(hide_password=False)

    try:
        yield new
    finally:
        with admin.connect() as connection:
            for name in made:
                connection.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--batches", type=int, default=30)
    parser.add_argument("--postgres-url")
    args = parser.parse_args()
    result: dict[str, Any] = {"batch": BATCH, "batches": args.batches}
    with tempfile.TemporaryDirectory() as folder:
        result["sqlite"] = {
            "api": through_api(f"sqlite:///{Path(folder) / 'api.db'}", args.batches),
            "raw_insert": raw_insert(f"sqlite:///{Path(folder) / 'raw.db'}", args.batches),
        }
    if args.postgres_url:
        with scratch_postgres(args.postgres_url) as new_database:
            result["postgresql"] = {
                "api": through_api(new_database(), args.batches),
                "raw_insert": raw_insert(new_database(), args.batches),
            }
    for backend in ("sqlite", "postgresql"):
        if backend in result:
            figures = result[backend]
            figures["api_to_raw_wall"] = round(
                figures["api"]["records_per_s_wall"]
                / figures["raw_insert"]["records_per_s_wall"], 3)
    print(json.dumps(result, indent=2))


if __name__ == "__main__":
    main()
