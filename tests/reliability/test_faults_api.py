"""An API server killed with SIGKILL (master and workers at once) while it is
storing a large batch: the batch is all or nothing (docs/architecture.md,
invariant 5; docs/http-api.md, "Records"). The kills land at
spread moments across the time one batch takes, measured first on the same
database; after each kill a new server starts on the same database.
"""

from __future__ import annotations

import http.client
import json
import signal
import threading
import time
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import create_engine, func, select

from service.store.tables import RecordRow
from tests.reliability.harness import ADMIN, Client, api_server, stop_group

pytestmark = pytest.mark.slow
FIELDS = [f"x{i}" for i in range(12)]
SPEC = {"name": "crash-ingest", "task": "regression", "target": "y",
        "features": [{"name": f, "type": "numeric"} for f in FIELDS]}
BATCH = 10_000  # the per-request limit
KILL_FRACTIONS = [0.15, 0.4, 0.65, 0.9]


def body(prefix: str) -> bytes:
    return json.dumps({"records": [
        {"key": f"{prefix}-{i}", "features": {f: float((i * 7 + k) % 101) for k, f in
                                              enumerate(FIELDS)}, "label": float(i % 13)}
        for i in range(BATCH)]}).encode()


def stored(database_url: str, prefix: str) -> int:
    engine = create_engine(database_url)
    try:
        with engine.connect() as connection:
            return int(connection.execute(select(func.count()).select_from(RecordRow).where(
                RecordRow.key.like(f"{prefix}-%"))).scalar_one())
    finally:
        engine.dispose()


def post(base: str, data: bytes, outcome: dict[str, Any]) -> None:
    host, port = base.removeprefix("http://").split(":")
    connection = http.client.HTTPConnection(host, int(port), timeout=60)
    try:
        connection.request("POST", f"/v1/models/{SPEC['name']}/records", body=data, headers={
            "Authorization": f"Bearer {ADMIN}", "Content-Type": "application/json"})
        outcome["status"] = connection.getresponse().status
    except (OSError, http.client.HTTPException) as exc:
        outcome["error"] = type(exc).__name__
    finally:
        connection.close()


def test_a_server_killed_mid_ingest_stores_all_or_nothing(
    database_url: str, tmp_path: Path
) -> None:
    with api_server(database_url, tmp_path, workers=1, gunicorn_only=True) as (base, _process):
        assert Client(base).request("POST", "/v1/models", SPEC)[0] == 201
        started = time.monotonic()
        outcome: dict[str, Any] = {}
        post(base, body("baseline"), outcome)
        took = time.monotonic() - started
    assert outcome == {"status": 201} and stored(database_url, "baseline") == BATCH

    results = []
    for n, fraction in enumerate(KILL_FRACTIONS):
        prefix = f"kill{n}"
        data = body(prefix)
        with api_server(database_url, tmp_path, workers=1, gunicorn_only=True) as (base,
                                                                                 process):
            outcome = {}
            sender = threading.Thread(target=post, args=(base, data, outcome))
            sender.start()
            time.sleep(fraction * took)
            stop_group(process, signal.SIGKILL)
            sender.join(60)
        count = stored(database_url, prefix)
        results.append((fraction, outcome, count))
        assert count in (0, BATCH), results
        if outcome.get("status") == 201:
            assert count == BATCH, results
    print(f"one batch of {BATCH} took {took:.2f} s; kills: {results}")
    # The kills must have landed before the answer for the test to mean anything.
    assert sum("error" in outcome for _, outcome, _ in results) >= 2, results
