"""An API server killed with SIGKILL (master and workers at once) while it
accepts a batch of outcomes: the batch is whole or absent (docs/http-api.md,
"Outcomes"; docs/architecture.md, invariant 5). Whole: every case has its
outcome and every outcome is a record. Absent: no case has one and no record
was stored. One kill lands inside the batch's transaction every time (a
test-only trigger stalls the records' insert, tests/worker/hold.py, after the
cases were already marked); others at spread moments across the time one batch
takes, measured first on the same database.
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

from engine import Learner
from service.store.tables import ModelRow, RecordRow, ScoredCaseRow, VersionRow
from tests.reliability.harness import ADMIN, Client, api_server, stop_group, wait_for
from tests.worker.helpers import database
from tests.worker.hold import end_orphans, hold, inside_hold, install_hold, release

pytestmark = pytest.mark.slow
FIELDS = [f"x{i}" for i in range(6)]
SPEC = {"name": "crash-outcomes", "task": "regression", "target": "y",
        "features": [{"name": f, "type": "numeric"} for f in FIELDS]}
BATCH = 5_000
SCORE_BATCH = 1_000  # KEELSON_MAX_PREDICTION_BATCH
KILL_FRACTIONS = [0.3, 0.7]


def features(i: int) -> dict[str, float]:
    return {f: float((i * 7 + k) % 101) for k, f in enumerate(FIELDS)}


def activate_a_version(database_url: str) -> None:
    """An active version stored straight in the database (no worker needed)."""
    db = database(database_url)
    try:
        with db.write() as session:
            model = session.scalars(select(ModelRow)).one()
            rows = [features(i) for i in range(64)]
            learner = Learner.create(model.spec, warmup=rows,
                                     warmup_labels=[float(i % 13) for i in range(64)])
            version = VersionRow(model_id=model.id, number=1, origin="online",
                                 status="active", snapshot=learner.to_bytes(), cursor=0,
                                 records_seen=0, metrics={})
            session.add(version)
            session.flush()
            model.active_version_id = version.id
            session.commit()
    finally:
        db.engine.dispose()


def score(client: Client, prefix: str) -> None:
    for start in range(0, BATCH, SCORE_BATCH):
        status, body, _ = client.request("POST", f"/v1/models/{SPEC['name']}/predictions", {
            "explain": "none", "records": [
                {"key": f"{prefix}-{i}", "features": features(i)}
                for i in range(start, start + SCORE_BATCH)]})
        assert status == 200, body


def outcomes(prefix: str) -> bytes:
    return json.dumps({"outcomes": [{"key": f"{prefix}-{i}", "label": float(i % 13)}
                                    for i in range(BATCH)]}).encode()


def stored(database_url: str, prefix: str) -> tuple[set[str], set[str]]:
    """(keys of cases with an outcome, keys of records) under ``prefix``."""
    engine = create_engine(database_url)
    try:
        with engine.connect() as connection:
            cases = set(connection.execute(select(ScoredCaseRow.key).where(
                ScoredCaseRow.key.like(f"{prefix}-%"),
                ScoredCaseRow.outcome_at.is_not(None))).scalars())
            records = set(connection.execute(select(RecordRow.key).where(
                RecordRow.key.like(f"{prefix}-%"))).scalars())
        return cases, records
    finally:
        engine.dispose()


def whole(prefix: str) -> tuple[set[str], set[str]]:
    keys = {f"{prefix}-{i}" for i in range(BATCH)}
    return keys, keys


def post(base: str, data: bytes, outcome: dict[str, Any]) -> None:
    host, port = base.removeprefix("http://").split(":")
    connection = http.client.HTTPConnection(host, int(port), timeout=60)
    try:
        connection.request("POST", f"/v1/models/{SPEC['name']}/outcomes", body=data, headers={
            "Authorization": f"Bearer {ADMIN}", "Content-Type": "application/json"})
        outcome["status"] = connection.getresponse().status
    except (OSError, http.client.HTTPException) as exc:
        outcome["error"] = type(exc).__name__
    finally:
        connection.close()


def test_a_server_killed_mid_outcome_batch_stores_it_whole_or_not_at_all(
    database_url: str, tmp_path: Path
) -> None:
    prefixes = ["baseline", "stalled", *(f"kill{n}" for n in range(len(KILL_FRACTIONS)))]
    with api_server(database_url, tmp_path, workers=1, gunicorn_only=True) as (base, _process):
        client = Client(base)
        assert client.request("POST", "/v1/models", SPEC)[0] == 201
        activate_a_version(database_url)
        for prefix in prefixes:
            score(client, prefix)
        started = time.monotonic()
        outcome: dict[str, Any] = {}
        post(base, outcomes("baseline"), outcome)
        took = time.monotonic() - started
    assert outcome == {"status": 201} and stored(database_url, "baseline") == whole("baseline")

    db = database(database_url)
    install_hold(db, "records", "seq")
    try:
        # Inside the transaction, every time: the cases are marked, the
        # records' insert is stalled; the kill leaves nothing of either.
        hold(db, beyond=0)
        with api_server(database_url, tmp_path, workers=1, gunicorn_only=True) as (
                base, process):
            outcome = {}
            sender = threading.Thread(target=post, args=(base, outcomes("stalled"), outcome))
            sender.start()
            try:
                wait_for(lambda: inside_hold(db), timeout=120)
            finally:
                stop_group(process, signal.SIGKILL)
                sender.join(60)
        end_orphans(db)
        assert "error" in outcome and stored(database_url, "stalled") == (set(), set()), outcome
        release(db)

        results = []
        for n, fraction in enumerate(KILL_FRACTIONS):
            prefix = f"kill{n}"
            data = outcomes(prefix)
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
            results.append((fraction, outcome, len(found[0]), len(found[1])))
            assert found in ((set(), set()), whole(prefix)), results
            if outcome.get("status") == 201:
                assert found == whole(prefix), results
        print(f"one batch of {BATCH} outcomes took {took:.2f} s; kills: {results}")
    finally:
        db.engine.dispose()
