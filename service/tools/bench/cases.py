"""``keelson bench cases``: what keeping scored cases costs, SQLite and PostgreSQL.

For each database: a scratch database is migrated, loaded with the invented
pump-station records and trained in process until a version is active (as
``keelson bench http`` does); a real gunicorn (2 workers) serves it on
loopback, and:

* ``predict_unkeyed`` and ``predict_keyed``: ``wrk`` GETs one prediction
  explained with integrated gradients, without and with a case key (a new key
  per request, so every keyed request stores a case). Both go through the same
  wrk script (the same per-request cost in the load generator), alternating
  unkeyed, keyed, unkeyed, keyed, so drift on a shared machine touches both;
  the ratio is keyed over unkeyed requests/s, summed over both rounds;
* ``outcome_ingest``: cases scored with keys in batches of 1,000 (``POST
  .../predictions``, explain none), then their outcomes sent as ``POST
  .../outcomes`` of 1,000 each, one after another on one connection:
  outcomes/s over the whole run, and the time per batch.
"""

from __future__ import annotations

import http.client
import json
import os
import platform
import shutil
import statistics
import tempfile
import time
from pathlib import Path
from typing import Any
from urllib.parse import urlencode, urlsplit

import click

from service.tools.bench.http import (
    TRAINING_RECORDS,
    WEB_WORKERS,
    Progress,
    _gunicorn,
    _wrk,
    _wrk_version,
)
from service.tools.bench.scratch import scratch_postgres
from service.tools.bench.trained import trained_demo
from service.tools.demo import data as demo_data

OUTCOME_BATCH = 1_000
OUTCOME_BATCHES = 20


def run_cases_bench(duration: int = 5, connections: int = 8, postgres_url: str | None = None,
                    outcome_batches: int = OUTCOME_BATCHES,
                    progress: Progress = lambda _: None) -> dict[str, Any]:
    """Measure and return one JSON-ready object (see the module docstring)."""
    wrk = shutil.which("wrk")
    if wrk is None:
        raise click.ClickException(
            "keelson bench cases needs wrk, the HTTP load generator, on PATH "
            "(Debian/Ubuntu: apt-get install wrk). Nothing was measured.")
    result: dict[str, Any] = {
        "benchmark": "cases",
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                    "platform": platform.platform(),
                    "load_average_1m_at_start": round(os.getloadavg()[0], 2)},
        "settings": {"web_workers": WEB_WORKERS, "connections": connections,
                     "duration_s_per_round": duration, "outcome_batch": OUTCOME_BATCH,
                     "outcome_batches": outcome_batches, "load_generator": _wrk_version(wrk)},
        "targets": {"keyed_to_unkeyed": 0.6, "outcomes_per_s": 10_000},
    }
    with tempfile.TemporaryDirectory(prefix="keelson-bench-") as scratch:
        result["sqlite"] = _measure(f"sqlite:///{scratch}/bench.db", Path(scratch), wrk,
                                    duration, connections, outcome_batches, progress)
        if postgres_url:
            with scratch_postgres(postgres_url) as url:
                result["postgresql"] = _measure(url, Path(scratch), wrk, duration,
                                                connections, outcome_batches, progress)
    return result


def _key_script(path: Path, run: str, keyed: bool) -> Path:
    # wrk's Lua: each thread numbers its requests; a keyed run appends a key
    # unique to the run, the thread and the request, an unkeyed one nothing.
    suffix = f'"&key={run}-" .. id .. "-" .. n' if keyed else '""'
    path.write_text(
        "local threads = 0\n"
        "function setup(thread) threads = threads + 1; thread:set('id', threads) end\n"
        "local n = 0\n"
        f"function request() n = n + 1; return wrk.format(nil, wrk.path .. {suffix}) end\n")
    return path


def _measure(url: str, scratch: Path, wrk: str, duration: int, connections: int,
             outcome_batches: int, progress: Progress) -> dict[str, Any]:

    trained = trained_demo(url, TRAINING_RECORDS, progress)
    backend, token = trained.backend, trained.token

    features = demo_data.SHOWCASE[0][1]
    query = {k: str(v).lower() if isinstance(v, bool) else v for k, v in features.items()}
    target = f"/v1/models/{demo_data.MODEL_NAME}/predictions?" + urlencode(
        {**query, "explain": "integrated_gradients"})
    figures: dict[str, Any] = {"predict_unkeyed": [], "predict_keyed": []}
    with _gunicorn(url, token, scratch / f"gunicorn-cases-{backend}.log") as (base, server):
        auth = f"Authorization: Bearer {token}"
        for round_ in (1, 2):
            for name, keyed in (("predict_unkeyed", False), ("predict_keyed", True)):
                progress(f"[{backend}] wrk {name}, round {round_}: {connections} connections, "
                         f"{duration} s")
                script = _key_script(scratch / f"{name}.lua", f"w{round_}", keyed)
                figures[name].append(_wrk(wrk, base + target, [auth], script, duration,
                                          connections, server))
        # Each keyed request stored a case of its own (wrk counts the answers
        # it read; a few more may have been in flight when a round ended).
        figures["cases_stored_by_keyed_rounds"] = _cases_stored(url)
        figures["keyed_requests_answered"] = sum(f["requests"]
                                                 for f in figures["predict_keyed"])
        progress(f"[{backend}] scoring {outcome_batches} x {OUTCOME_BATCH} keyed cases")
        figures["outcome_ingest"] = _outcomes(base, token, outcome_batches)
    unkeyed_rate = sum(f["requests_per_s"] for f in figures["predict_unkeyed"])
    keyed_rate = sum(f["requests_per_s"] for f in figures["predict_keyed"])
    figures["ratios"] = {"keyed_to_unkeyed": round(keyed_rate / unkeyed_rate, 3)
                         if unkeyed_rate else None}
    return figures


def _cases_stored(url: str) -> int:
    from sqlalchemy import func, select

    from service.store.database import make_engine
    from service.store.tables import ScoredCaseRow

    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            return int(connection.scalar(select(func.count()).select_from(ScoredCaseRow)) or 0)
    finally:
        engine.dispose()


def _outcomes(base: str, token: str, batches: int) -> dict[str, Any]:
    """Score ``batches`` x 1,000 keyed cases, then send their outcomes, timed."""
    parts = urlsplit(base)
    connection = http.client.HTTPConnection(parts.hostname or "127.0.0.1", parts.port,
                                            timeout=120)
    headers = {"Authorization": f"Bearer {token}", "Content-Type": "application/json"}
    predict = f"/v1/models/{demo_data.MODEL_NAME}/predictions"
    outcomes = f"/v1/models/{demo_data.MODEL_NAME}/outcomes"
    stream = demo_data.generate_records(batches * OUTCOME_BATCH, seed=13)
    labels: list[list[dict[str, Any]]] = []
    try:
        for b in range(batches):
            rows = [next(stream) for _ in range(OUTCOME_BATCH)]
            keys = [f"case-{b}-{i}" for i in range(OUTCOME_BATCH)]
            _post(connection, predict, headers, {"explain": "none", "records": [
                {"key": key, "features": row["features"]} for key, row in zip(
                    keys, rows, strict=True)]}, 200)
            labels.append([{"key": key, "label": row["label"]}
                           for key, row in zip(keys, rows, strict=True)])
        bodies = [json.dumps({"outcomes": batch}).encode() for batch in labels]
        took: list[float] = []
        started = time.perf_counter()
        for body in bodies:
            begun = time.perf_counter()
            _post(connection, outcomes, headers, body, 201)
            took.append(time.perf_counter() - begun)
        seconds = time.perf_counter() - started
    finally:
        connection.close()
    count = batches * OUTCOME_BATCH
    return {"outcomes": count, "seconds": round(seconds, 3),
            "outcomes_per_s": round(count / seconds, 1),
            "batch_ms_p50": round(statistics.median(took) * 1000, 2),
            "batch_ms_max": round(max(took) * 1000, 2)}


def _post(connection: http.client.HTTPConnection, path: str, headers: dict[str, str],
          body: Any, expect: int) -> None:
    data = body if isinstance(body, bytes) else json.dumps(body).encode()
    connection.request("POST", path, body=data, headers=headers)
    answer = connection.getresponse()
    text = answer.read()
    if answer.status != expect:
        raise click.ClickException(f"POST {path} answered {answer.status}: {text[:300]!r}")
