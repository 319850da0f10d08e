"""A bounded mixed load on a real ``keelson serve`` (gunicorn + worker) on
loopback: ingest (with re-sent batches), explained predictions (GET and
POST), online training by the worker, reads of models and versions, and a
retrain in the middle. Held: no 5xx answer, no connection error, every
acknowledged record stored once (re-sent batches count as duplicates), the
worker ends having applied every train record exactly once (its head's
weights equal, bit for bit, the engine's own pass over its lineage's
records), the retrain succeeds. Reported: requests/s and prediction latency p50/p99.

``KEELSON_LOAD_SECONDS`` sets the length (default 10 s per backend, the CI
run); the README figures come from
``KEELSON_LOAD_SECONDS=60 pytest tests/reliability/test_load.py -s``.
"""

from __future__ import annotations

import json
import os
import random
import threading
import time
from collections import Counter
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import create_engine, func, select

from service.store.tables import ModelRow, RecordRow
from tests.reliability.harness import Client, api_server, wait_for
from tests.worker.helpers import assert_trained_exactly_once, database

pytestmark = pytest.mark.slow
SECONDS = float(os.environ.get("KEELSON_LOAD_SECONDS", "10"))
MODEL = "station-load"
SPEC = {
    "name": MODEL, "task": "binary", "target": "failed", "classes": ["ok", "failed"],
    "features": [
        {"name": "vibration_rms", "type": "numeric", "min": 0, "max": 50},
        {"name": "bearing_temp_c", "type": "numeric", "min": -20, "max": 150},
        {"name": "pump_family", "type": "categorical", "levels": ["centrifugal", "screw"]},
        {"name": "has_vfd", "type": "boolean"},
    ],
    "hidden_layers": [16, 8],
    "training": {"checkpoint_every": 500, "warmup_records": 64, "max_epochs": 20},
}


def features(rng: random.Random) -> dict[str, Any]:
    return {"vibration_rms": round(rng.uniform(0, 50), 2),
            "bearing_temp_c": round(rng.uniform(-20, 150), 1),
            "pump_family": rng.choice(["centrifugal", "screw"]), "has_vfd": rng.random() < 0.5}


def records(keys: range, rng: random.Random) -> dict[str, Any]:
    rows = []
    for key in keys:
        row = features(rng)
        risky = row["vibration_rms"] > 25 and row["bearing_temp_c"] > 60
        rows.append({"key": f"k{key}", "features": row, "label": "failed" if risky else "ok"})
    return {"records": rows}


def percentile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))]


class Tally:
    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.statuses: Counter[tuple[str, int]] = Counter()
        self.errors: list[str] = []
        self.latencies: list[float] = []
        self.accepted: set[str] = set()
        self.duplicates = 0
        self.resent = 0

    def call(self, client: Client, kind: str, method: str, path: str, body: Any = None
             ) -> tuple[int, Any]:
        started = time.perf_counter()
        try:
            status, answer, _ = client.request(method, path, body)
        except OSError as exc:
            with self.lock:
                self.errors.append(f"{kind}: {exc!r}")
            return 0, None
        took = time.perf_counter() - started
        with self.lock:
            self.statuses[(kind, status)] += 1
            if kind == "predict-get":
                self.latencies.append(took)
        return status, answer


def test_a_mixed_load_loses_nothing_and_answers_no_5xx(database_url: str, tmp_path: Path
                                                       ) -> None:
    tally = Tally()
    stop = threading.Event()
    with api_server(database_url, tmp_path, workers=2, with_worker=True) as (base, server):
        admin = Client(base)
        assert admin.request("POST", "/v1/models", SPEC)[0] == 201
        assert admin.request("POST", f"/v1/models/{MODEL}/records",
                             records(range(0, 400), random.Random(0)))[0] == 201
        tally.accepted.update(f"k{i}" for i in range(400))
        wait_for(lambda: admin.request("GET", f"/v1/models/{MODEL}")[1]["active_version"],
                 timeout=120)
        next_key = [400]

        def ingester(seed: int) -> None:
            rng, client, sent = random.Random(seed), Client(base), []
            while not stop.is_set():
                if sent and rng.random() < 0.2:  # a client retrying a batch it sent
                    batch = rng.choice(sent)
                    status, body = tally.call(client, "ingest", "POST",
                                              f"/v1/models/{MODEL}/records", batch)
                    if status == 201:
                        with tally.lock:
                            tally.resent += len(batch["records"])
                            tally.duplicates += body["duplicates"]
                    continue
                with tally.lock:
                    start = next_key[0]
                    next_key[0] += 50
                batch = records(range(start, start + 50), rng)
                status, body = tally.call(client, "ingest", "POST",
                                          f"/v1/models/{MODEL}/records", batch)
                if status == 201:
                    assert body == {"accepted": 50, "duplicates": 0}, body
                    sent.append(batch)
                    with tally.lock:
                        tally.accepted.update(r["key"] for r in batch["records"])
            client.close()

        def predictor(seed: int) -> None:
            rng, client = random.Random(seed), Client(base)
            while not stop.is_set():
                if rng.random() < 0.8:
                    row = features(rng)
                    query = "&".join(f"{k}={str(v).lower()}" for k, v in row.items())
                    tally.call(client, "predict-get", "GET",
                               f"/v1/models/{MODEL}/predictions?{query}")
                else:
                    body = {"records": [{"features": features(rng)} for _ in range(20)],
                            "explain": "gradient"}
                    tally.call(client, "predict-post", "POST",
                               f"/v1/models/{MODEL}/predictions", body)
            client.close()

        def operator() -> None:
            client = Client(base)
            time.sleep(SECONDS / 3)
            status, body = tally.call(client, "retrain", "POST", f"/v1/models/{MODEL}/retrain",
                                      {"warm_start": False})
            assert status == 202, body
            job = body["job"]["id"]
            while not stop.is_set():
                tally.call(client, "read", "GET", f"/v1/models/{MODEL}")
                tally.call(client, "read", "GET", f"/v1/models/{MODEL}/versions")
                tally.call(client, "read", "GET", f"/v1/jobs/{job}")
                time.sleep(0.2)
            client.close()

        threads = [threading.Thread(target=ingester, args=(s,)) for s in (1, 2)]
        threads += [threading.Thread(target=predictor, args=(s,)) for s in (3, 4, 5, 6)]
        threads.append(threading.Thread(target=operator))
        started = time.monotonic()
        for thread in threads:
            thread.start()

        def enough() -> bool:
            # SECONDS of load, and on until each kind of work has been done
            # often enough to mean something (a busy machine does less a second).
            with tally.lock:
                return (time.monotonic() - started >= SECONDS and len(tally.latencies) > 50
                        and tally.statuses[("ingest", 201)] >= 20
                        and tally.statuses[("retrain", 202)] == 1)

        try:
            wait_for(enough, timeout=SECONDS + 300, every=0.2)
        finally:
            stop.set()
        for thread in threads:
            thread.join(60)
        elapsed = time.monotonic() - started
        assert not any(thread.is_alive() for thread in threads)

        # Let the worker finish: the trainer's cursor (moved only by a version
        # write) has reached the last record.
        def settled() -> Any:
            model = admin.request("GET", f"/v1/models/{MODEL}")[1]
            return None if model["trainer"]["lag"] else model

        model = wait_for(settled, timeout=120, every=0.3)
        jobs = wait_for(lambda: (job := admin.request("GET", "/v1/jobs/1")[1])["status"] in (
            "succeeded", "failed") and job, timeout=120, every=0.3)
        model = wait_for(settled, timeout=120, every=0.3)  # a promoted retrain moves the head
        assert server.poll() is None
    fivexx = {key: n for key, n in tally.statuses.items() if key[1] >= 500 or key[1] == 0}
    assert not tally.errors and not fivexx, (tally.errors[:5], fivexx)
    unexpected = {key: n for key, n in tally.statuses.items()
                  if key[1] not in (200, 201, 202)}
    assert not unexpected, unexpected
    assert jobs["status"] == "succeeded", f"retrain failed: {jobs.get('error')}"
    engine = create_engine(database_url)
    with engine.connect() as connection:
        keys = [row[0] for row in connection.execute(select(RecordRow.key))]
        total = connection.execute(select(func.count()).select_from(RecordRow)).scalar()
    engine.dispose()
    assert len(keys) == len(set(keys)) == total == len(tally.accepted)
    assert set(keys) == tally.accepted
    assert tally.duplicates == tally.resent  # every re-sent record counted, none stored
    assert model["records"]["total"] == total
    db = database(database_url)
    try:
        with db.read() as session:
            model_id = session.scalars(select(ModelRow.id).where(ModelRow.name == MODEL)).one()
        assert_trained_exactly_once(db, model_id)
    finally:
        db.engine.dispose()
    latencies = tally.latencies
    requests = sum(tally.statuses.values())
    figures = {
        "seconds": round(elapsed, 1), "requests": requests,
        "requests_per_second": round(requests / elapsed, 1),
        "by_kind": {f"{kind} {status}": n for (kind, status), n in sorted(
            tally.statuses.items())},
        "records_stored": total, "records_lost": len(tally.accepted - set(keys)),
        "duplicates_refused": tally.duplicates,
        "predict_get_p50_ms": round(1000 * percentile(latencies, 0.50), 1),
        "predict_get_p99_ms": round(1000 * percentile(latencies, 0.99), 1),
        "backend": database_url.split(":", 1)[0],
    }
    print("load figures:", json.dumps(figures))
    (tmp_path / "load.json").write_text(json.dumps(figures))
    assert len(latencies) > 50, figures
