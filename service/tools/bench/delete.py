"""``keelson bench delete``: other models' predictions while a big model is deleted.

For each database: a scratch database is migrated and loaded with the
invented pump-station scenario (``pump-risk`` trained in process until a
version is active, as ``keelson bench http`` does) and a second model,
``pump-retired``, holding ``--records`` records written straight into the
table (a bulk load, not the measured part). Then, in this process, through
the app (Flask's test client, no network):

* ``baseline``: GET predictions of ``pump-risk``, alternately without and with
  a case key (a keyed one stores a scored case: a write transaction), one
  after another, for ``--seconds``; percentiles of all, of the unkeyed and of
  the keyed ones;
* ``during_delete``: ``DELETE /v1/models/pump-retired?confirm=pump-retired``,
  a worker started as its own process (``python -m service.worker``) runs the
  delete job, and the same predictions go on until the job has succeeded.

Reported: the latency percentiles of both phases (each prediction timed
alone), their p99 ratio (the target: at most 2), the delete's time and
records removed per second. The two phases share the machine with whatever
else runs on it: the load average at the start is in the result.
"""

from __future__ import annotations

import os
import platform
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any
from urllib.parse import urlencode

from service.tools.bench.scratch import scratch_postgres
from service.tools.bench.trained import trained_demo
from service.tools.demo import data as demo_data

Progress = Callable[[str], None]
RETIRED = "pump-retired"
TRAINING_RECORDS = 5_000
LOAD_BATCH = 20_000


def run_delete_bench(records: int = 1_000_000, seconds: float = 20.0,
                     postgres_url: str | None = None,
                     progress: Progress = lambda _: None) -> dict[str, Any]:
    """Measure and return one JSON-ready object (see the module docstring)."""
    result: dict[str, Any] = {
        "benchmark": "delete",
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                    "platform": platform.platform(),
                    "load_average_1m_at_start": round(os.getloadavg()[0], 2)},
        "settings": {"records_deleted": records, "baseline_seconds": seconds},
        "targets": {"p99_during_to_baseline": 2.0},
    }
    with tempfile.TemporaryDirectory(prefix="keelson-bench-") as scratch:
        result["sqlite"] = _measure(f"sqlite:///{scratch}/bench.db", Path(scratch), records,
                                    seconds, progress)
        if postgres_url:
            with scratch_postgres(postgres_url) as url:
                result["postgresql"] = _measure(url, Path(scratch), records, seconds,
                                                progress)
    return result


def _measure(url: str, scratch: Path, records: int, seconds: float,
             progress: Progress) -> dict[str, Any]:
    from service.web.extensions import close_drift_tally, get_database

    trained = trained_demo(url, TRAINING_RECORDS, progress)
    backend, app, api = trained.backend, trained.app, trained.api
    api.call("POST", "/v1/models", expect=(201,),
             json={**demo_data.model_spec(), "name": RETIRED})
    progress(f"[{backend}] loading {records} records into {RETIRED}")
    _bulk_load(url, records)

    features = demo_data.SHOWCASE[0][1]
    query = urlencode({k: str(v).lower() if isinstance(v, bool) else v
                       for k, v in features.items()})
    path = f"/v1/models/{demo_data.MODEL_NAME}/predictions?{query}"
    counter = iter(range(10**12))

    def predict() -> tuple[bool, float]:
        number = next(counter)
        keyed = f"&key=bench-{number}" if number % 2 else ""
        started = time.perf_counter()
        api.call("GET", path + keyed)
        return bool(keyed), time.perf_counter() - started

    progress(f"[{backend}] baseline predictions for {seconds} s")
    deadline = time.monotonic() + seconds
    baseline = [predict() for _ in iter(lambda: time.monotonic() < deadline, False)]

    log = scratch / f"worker-{backend}.log"
    env = {**os.environ, "KEELSON_DATABASE_URL": url}
    with log.open("wb") as sink:
        worker = subprocess.Popen([sys.executable, "-m", "service.worker", "bench-delete"],
                                  env=env, stdout=sink, stderr=subprocess.STDOUT)
    try:
        progress(f"[{backend}] deleting {RETIRED} while predicting")
        body, _ = api.call("DELETE", f"/v1/models/{RETIRED}?confirm={RETIRED}",
                           expect=(202,))
        job_path = f"/v1/jobs/{body['job']['id']}"
        accepted = time.perf_counter()
        during: list[tuple[bool, float]] = []
        job: dict[str, Any] = {}
        while True:
            during.extend(predict() for _ in range(50))
            job, _ = api.call("GET", job_path)
            if job["status"] in ("succeeded", "failed"):
                break
            if worker.poll() is not None:
                raise RuntimeError(f"the worker stopped: {log.read_text()[-2000:]}")
        elapsed = time.perf_counter() - accepted
    finally:
        worker.terminate()
        worker.wait(60)
        close_drift_tally(app)  # its last flush, while the database exists
        get_database(app).engine.dispose()
    if job["status"] != "succeeded":
        raise RuntimeError(f"the delete job failed: {job['error']}")
    started, finished = job["started_at"], job["finished_at"]
    base, busy = _percentiles(baseline), _percentiles(during)
    return {
        "baseline": base,
        "during_delete": busy,
        "p99_during_to_baseline": round(busy["all"]["p99_ms"] / base["all"]["p99_ms"], 3),
        "p99_during_to_baseline_unkeyed": round(
            busy["unkeyed"]["p99_ms"] / base["unkeyed"]["p99_ms"], 3),
        "p99_during_to_baseline_keyed": round(
            busy["keyed"]["p99_ms"] / base["keyed"]["p99_ms"], 3),
        "delete": {"records": job["progress"]["records_deleted"],
                   "accepted_to_done_s": round(elapsed, 2),
                   "job_started_at": started, "job_finished_at": finished,
                   "records_per_s": round(job["progress"]["records_deleted"] / elapsed, 1)},
    }


def _percentiles(timed: list[tuple[bool, float]]) -> dict[str, Any]:
    """Latency percentiles of every prediction, of the unkeyed ones (no
    database touched: the version is cached) and of the keyed ones (each
    stores a scored case: a write transaction)."""
    import numpy as np

    def summary(seconds: list[float]) -> dict[str, Any]:
        values = np.array(seconds) * 1000.0
        return {"predictions": len(seconds),
                **{f"p{q}_ms": round(float(np.percentile(values, q)), 3) for q in (50, 90, 99)},
                "max_ms": round(float(values.max()), 3)}

    return {"all": summary([s for _, s in timed]),
            "unkeyed": summary([s for keyed, s in timed if not keyed]),
            "keyed": summary([s for keyed, s in timed if keyed])}


def _bulk_load(url: str, records: int) -> None:
    """``records`` rows of the scenario straight into the records table, and
    the model's counters to match."""
    from sqlalchemy import insert, select, update

    from service.store.database import make_engine, refresh_planner_statistics
    from service.store.tables import ModelRow, RecordRow, utcnow

    engine = make_engine(url)
    try:
        with engine.begin() as connection:
            model_id = connection.scalar(select(ModelRow.id).where(ModelRow.name == RETIRED))
        template = [{"features": r["features"], "label": r["label"]}
                    for r in demo_data.generate_records(LOAD_BATCH, seed=13)]
        now = utcnow()
        for start in range(0, records, LOAD_BATCH):
            rows = [{"model_id": model_id, "key": None, "split": "train", "received_at": now,
                     **item} for item in template[:min(LOAD_BATCH, records - start)]]
            with engine.begin() as connection:
                connection.execute(insert(RecordRow), rows)
        with engine.begin() as connection:
            connection.execute(update(ModelRow).where(ModelRow.id == model_id)
                               .values(records_train=records))
        refresh_planner_statistics(engine, "records")
    finally:
        engine.dispose()
