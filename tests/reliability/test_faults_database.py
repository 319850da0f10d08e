"""The database goes away under a running API and worker, and comes back.

PostgreSQL: the machine's server is shared with tests running in parallel, so
it is never stopped. Instead (1) every backend of this test's database is
terminated with ``pg_terminate_backend`` (what a server restart does to
existing connections), and (2) the API and the worker reach the database
through a loopback TCP proxy that is cut (connections reset, new ones refused,
as while a server is down) and restored. While it is away the API answers 503
problem details and stays alive; afterwards it recovers by itself, the worker
resumes, and every record acknowledged with 201 is stored and trained on
exactly once (our own contract: docs/http-api.md, "Errors"; docs/architecture.md,
invariants 1 and 2).

SQLite: many threads ingest into one file at once through real gunicorn
workers; none of them may see "database is locked" as a 500.
"""

from __future__ import annotations

import threading
import time
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import create_engine, func, select, text
from sqlalchemy.engine import make_url

from service.store.tables import RecordRow
from tests.reliability.harness import Client, TcpProxy, api_server, wait_for, worker_process

pytestmark = pytest.mark.slow
FIELDS = [f"x{i}" for i in range(4)]
SPEC = {"name": "outage", "task": "binary", "target": "y",
        "features": [{"name": f, "type": "numeric"} for f in FIELDS], "hidden_layers": [8],
        "training": {"checkpoint_every": 100, "warmup_records": 32}}


def batch(start: int, n: int, prefix: str = "r") -> dict[str, Any]:
    return {"records": [
        {"key": f"{prefix}{i}", "features": {f: float((i * (k + 3)) % 17) for k, f in
                                             enumerate(FIELDS)}, "label": (i % 3) == 0}
        for i in range(start, start + n)]}


def stored_keys(database_url: str) -> list[str]:
    engine = create_engine(database_url)
    try:
        with engine.connect() as connection:
            return [row[0] for row in connection.execute(select(RecordRow.key))]
    finally:
        engine.dispose()


def terminate_backends(database_url: str) -> int:
    """pg_terminate_backend on every other session of this test's database."""
    name = make_url(database_url).database
    admin = create_engine(make_url(database_url).set(database="postgres"),
                          isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as connection:
            return len(connection.execute(text(
                "SELECT pg_terminate_backend(pid) FROM pg_stat_activity "
                "WHERE datname = :name AND pid <> pg_backend_pid()"), {"name": name}).all())
    finally:
        admin.dispose()


def trained_everything(client: Client) -> bool:
    status, model, _ = client.request("GET", "/v1/models/outage")
    if status != 200 or model["trainer"]["lag"] != 0:
        return False
    status, body, _ = client.request("GET", "/v1/models/outage/versions")
    seen = max((v["records_seen"] for v in body["versions"]), default=0)
    return seen == model["records"]["train"]


def test_postgres_cut_off_and_restored_under_api_and_worker(
    postgres_url: str, tmp_path: Path
) -> None:
    proxy = TcpProxy(int(make_url(postgres_url).port or 5432))
    proxied = proxy.url_for(postgres_url)
    acknowledged: list[str] = []
    try:
        with api_server(proxied, tmp_path) as (base, api), \
                worker_process(proxied, tmp_path) as worker:
            client = Client(base, timeout=20)
            assert client.request("POST", "/v1/models", SPEC)[0] == 201
            for start in range(0, 300, 100):
                status, body, _ = client.request("POST", "/v1/models/outage/records",
                                                 batch(start, 100))
                assert (status, body) == (201, {"accepted": 100, "duplicates": 0})
                acknowledged += [f"r{i}" for i in range(start, start + 100)]
            wait_for(lambda: client.request("GET", "/v1/models/outage")[1]["active_version"])

            # 1. Every connection killed, as by a server restart: the pools
            #    notice (pre-ping) and reconnect; no request fails.
            assert terminate_backends(postgres_url) >= 1
            for _ in range(6):
                assert client.request("GET", "/v1/models/outage")[0] == 200
            status, body, _ = client.request("POST", "/v1/models/outage/records",
                                             batch(300, 100))
            assert status == 201, body
            acknowledged += [f"r{i}" for i in range(300, 400)]

            # 2. The database unreachable for a while.
            proxy.cut()
            seen: dict[str, set[int]] = {"get": set(), "post": set(), "ready": set(),
                                         "health": set()}
            started = time.monotonic()
            while time.monotonic() - started < 3.0:
                status, body, headers = client.request("GET", "/v1/models/outage")
                seen["get"].add(status)
                if status == 503:
                    assert headers["content-type"] == "application/problem+json"
                    assert body["status"] == 503 and headers["retry-after"]
                seen["post"].add(client.request("POST", "/v1/models/outage/records",
                                                batch(400, 100))[0])
                seen["ready"].add(client.request("GET", "/readyz")[0])
                seen["health"].add(client.request("GET", "/healthz")[0])
                time.sleep(0.1)
            assert seen == {"get": {503}, "post": {503}, "ready": {503}, "health": {200}}, seen
            assert api.poll() is None and worker.poll() is None
            proxy.restore()

            # Back by itself: no restart of anything.
            wait_for(lambda: client.request("GET", "/v1/models/outage")[0] == 200, timeout=20)
            assert client.request("GET", "/readyz")[0] == 200
            # The batch refused during the outage stored nothing: all 100 are new.
            for start in (400, 500):
                status, body, _ = client.request("POST", "/v1/models/outage/records",
                                                 batch(start, 100))
                assert (status, body) == (201, {"accepted": 100, "duplicates": 0})
                acknowledged += [f"r{i}" for i in range(start, start + 100)]
            # The worker resumes and trains every record, none twice.
            wait_for(lambda: trained_everything(client), timeout=60)
            assert worker.poll() is None
            client.close()
    finally:
        proxy.close()
    keys = stored_keys(postgres_url)
    assert len(keys) == len(set(keys)) == len(acknowledged) == 600
    assert set(keys) == set(acknowledged)
    log = (tmp_path / "api.log").read_text()
    assert "Traceback" not in log, log[-3000:]
    # The outage reached the worker too: said once (not a traceback per poll),
    # then it kept trying and resumed above.
    worker_log = (tmp_path / "worker.log").read_text()
    assert worker_log.count("database unavailable") == 1, worker_log[-3000:]
    assert "database reachable again" in worker_log
    # At most the one step the cut interrupted is reported with its traceback.
    assert "lease bookkeeping failed" not in worker_log, worker_log[-3000:]
    assert worker_log.count("step failed") <= 1, worker_log[-3000:]


def test_an_unreachable_database_is_a_503_problem_not_a_500() -> None:
    """Without any server: an API whose database refuses connections (a closed
    loopback port) answers every database-backed route with 503 problem
    details and Retry-After (RFC 9110 section 15.6.4), and stays alive."""
    from tests.product.servers import free_port
    from tests.service.conftest import build_app
    from tests.service.helpers import ADMIN_TOKEN

    app = build_app(f"postgresql+psycopg://postgres@127.0.0.1:{free_port()}/nowhere",
                    TESTING=False)
    client = app.test_client()
    admin = {"Authorization": f"Bearer {ADMIN_TOKEN}"}
    for method, path, headers in [
        ("GET", "/v1/models", admin), ("GET", "/v1/models/outage", admin),
        ("POST", "/v1/models", admin), ("GET", "/v1/jobs/1", admin),
        ("GET", "/v1/models", {"Authorization": "Bearer a-token-to-look-up"}),
    ]:
        answer = client.open(path, method=method, headers=headers,
                             json=SPEC if method == "POST" else None)
        assert answer.status_code == 503, (method, path, answer.data)
        assert answer.mimetype == "application/problem+json"
        assert answer.headers["Retry-After"] == "1"
    assert client.get("/readyz").status_code == 503
    assert client.get("/healthz").status_code == 200


def test_sqlite_concurrent_writers_never_surface_a_lock_as_500(
    sqlite_url: str, tmp_path: Path
) -> None:
    """Four gunicorn workers x 4 threads on one SQLite file, 8 clients ingesting
    at once: every answer is 201 (the busy timeout and BEGIN IMMEDIATE queue
    the writers), and every acknowledged key is stored once."""
    with api_server(sqlite_url, tmp_path, workers=4, KEELSON_THREADS="4") as (base, _api):
        assert Client(base).request("POST", "/v1/models", SPEC)[0] == 201
        statuses: list[int] = []
        failures: list[BaseException] = []

        def ingest(writer: int) -> None:
            client = Client(base)
            try:
                for n in range(15):
                    start = (writer * 15 + n) * 40
                    statuses.append(client.request("POST", "/v1/models/outage/records",
                                                   batch(start, 40))[0])
                    statuses.append(client.request("GET", "/v1/models/outage")[0])
            except BaseException as exc:  # surfaced below
                failures.append(exc)
            finally:
                client.close()

        threads = [threading.Thread(target=ingest, args=(w,)) for w in range(8)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join(120)
        assert not failures, failures
        assert statuses.count(201) == 8 * 15 and statuses.count(200) == 8 * 15, (
            sorted(set(statuses)))
    keys = stored_keys(sqlite_url)
    assert len(keys) == len(set(keys)) == 8 * 15 * 40
    log = (tmp_path / "api.log").read_text()
    assert "database is locked" not in log and "Traceback" not in log, log[-3000:]
    engine = create_engine(sqlite_url)
    with engine.connect() as connection:
        assert connection.execute(select(func.count()).select_from(RecordRow)).scalar() == 4800
    engine.dispose()
