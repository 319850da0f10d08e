"""An API server killed with SIGKILL (master and workers at once) while it is
storing a large batch: the batch is all or nothing (docs/architecture.md,
invariant 5; docs/http-api.md, "Records"). Some kills land
inside the batch's transaction every time: a test-only trigger stalls the
records' insert (tests/worker/hold.py) and the test kills once it sees the
stall. Others land at spread moments across the time one batch takes,
measured first on the same database (before, during or after the insert,
wherever the clock puts them). After each kill a new server starts on the
same database.
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
from sqlalchemy import create_engine, select

from service.store.tables import RecordRow
from tests.reliability.harness import ADMIN, Client, api_server, stop_group, wait_for
from tests.worker.helpers import database
from tests.worker.hold import end_orphans, hold, inside_hold, install_hold, release

pytestmark = pytest.mark.slow
FIELDS = [f"x{i}" for i in range(12)]
SPEC = {"name": "crash-ingest", "task": "regression", "target": "y",
        "features": [{"name": f, "type": "numeric"} for f in FIELDS]}
BATCH = 10_000  # the per-request limit
# Two spread kills and one inside the insert: each is a server start, and
# the one inside the insert is the case that must leave nothing.
KILL_FRACTIONS = [0.3, 0.7]
STALLED_KILLS = 1


def body(prefix: str) -> bytes:
    return json.dumps({"records": [
        {"key": f"{prefix}-{i}", "features": {f: float((i * 7 + k) % 101) for k, f in
                                              enumerate(FIELDS)}, "label": float(i % 13)}
        for i in range(BATCH)]}).encode()


def stored(database_url: str, prefix: str) -> set[str]:
    engine = create_engine(database_url)
    try:
        with engine.connect() as connection:
            return set(connection.execute(select(RecordRow.key).where(
                RecordRow.key.like(f"{prefix}-%"))).scalars())
    finally:
        engine.dispose()


def keys(prefix: str) -> set[str]:
    return {f"{prefix}-{i}" for i in range(BATCH)}


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
    assert outcome == {"status": 201} and stored(database_url, "baseline") == keys("baseline")

    db = database(database_url)
    install_hold(db, "records", "seq")
    try:
        # Inside the insert, every time: nothing stored, no answer.
        for n in range(STALLED_KILLS):
            prefix = f"stalled{n}"
            hold(db, beyond=0)
            with api_server(database_url, tmp_path, workers=1, gunicorn_only=True) as (
                    base, process):
                outcome = {}
                sender = threading.Thread(target=post, args=(base, body(prefix), outcome))
                sender.start()
                try:
                    wait_for(lambda: inside_hold(db), timeout=120)
                finally:
                    stop_group(process, signal.SIGKILL)
                    sender.join(60)
            end_orphans(db)
            assert "error" in outcome and stored(database_url, prefix) == set(), outcome
        release(db)

        # At spread moments: all or nothing, whichever it was.
        results = []
        for n, fraction in enumerate(KILL_FRACTIONS):
            prefix = f"kill{n}"
            data = body(prefix)
            with api_server(database_url, tmp_path, workers=1, gunicorn_only=True) as (
                    base, process):
                outcome = {}
                sender = threading.Thread(target=post, args=(base, data, outcome))
                sender.start()
                time.sleep(fraction * took)
                stop_group(process, signal.SIGKILL)
                sender.join(60)
            end_orphans(db)
            found = stored(database_url, prefix)
            results.append((fraction, outcome, len(found)))
            assert found in (set(), keys(prefix)), results
            if outcome.get("status") == 201:
                assert found == keys(prefix), results
        print(f"one batch of {BATCH} took {took:.2f} s; kills: {results}")
    finally:
        db.engine.dispose()
