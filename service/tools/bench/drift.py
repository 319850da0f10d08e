"""``keelson bench drift``: what counting drift costs a prediction, and how
long the drift answer takes with a large tally table.

For each database (SQLite, and PostgreSQL with ``--postgres-url``) a scratch
database is loaded with the invented pump-station records and trained in
process until a version is active. Then, in this process, through the WSGI
app (no network, no gunicorn: the figure is the app's own cost):

* ``predictions``: unkeyed GET predictions (``explain=none``, the cheapest,
  where counting weighs most; and ``gradient``) on two apps over the same
  database, one with ``KEELSON_DRIFT=1`` and one with ``0``, in alternating
  rounds so a busy machine slows both alike; the ratio of their rates (target
  at least 0.9);
* ``answer``: ``GET /v1/models/{name}/drift`` after the tally table is
  filled as ``--writers`` API processes writing every hour for a year would
  fill it (one row per process and hour); the median and 95th percentile of
  the answer's time (target at most 50 ms), warm (the reference binned).
"""

from __future__ import annotations

import datetime as dt
import os
import platform
import statistics
import tempfile
import time
from collections.abc import Callable
from typing import Any
from urllib.parse import urlencode

from service.tools.bench.scratch import scratch_postgres
from service.tools.bench.trained import trained_demo
from service.tools.demo import data as demo_data

Progress = Callable[[str], None]
TRAINING_RECORDS = 3000
ROUNDS = 6
ANSWERS = 50
WINDOW_DAYS = 7


def run_drift_bench(requests: int = 2000, writers: int = 8, days: int = 365,
                    postgres_url: str | None = None,
                    progress: Progress = lambda _: None) -> dict[str, Any]:
    result: dict[str, Any] = {
        "benchmark": "drift",
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                    "platform": platform.platform(),
                    "load_average_1m_at_start": round(os.getloadavg()[0], 2)},
        "settings": {"requests_per_setting": requests, "rounds": ROUNDS,
                     "tally_writers": writers, "tally_days": days,
                     "window_days": WINDOW_DAYS},
    }
    with tempfile.TemporaryDirectory(prefix="keelson-bench-") as scratch:
        result["sqlite"] = _measure(f"sqlite:///{scratch}/bench.db", requests, writers, days,
                                    progress)
        if postgres_url:
            with scratch_postgres(postgres_url) as url:
                result["postgresql"] = _measure(url, requests, writers, days, progress)
        else:
            result["postgresql"] = {"skipped": "no --postgres-url (or "
                                               "KEELSON_BENCH_POSTGRES_URL) given"}
    result["machine"]["load_average_1m_at_end"] = round(os.getloadavg()[0], 2)
    return result


def _measure(url: str, requests: int, writers: int, days: int,
             progress: Progress) -> dict[str, Any]:
    from service.config import load_config
    from service.store.database import refresh_planner_statistics
    from service.web.app import create_app
    from service.web.extensions import close_drift_tally, get_database

    trained = trained_demo(url, TRAINING_RECORDS, progress)
    backend, token = trained.backend, trained.token
    base = {"KEELSON_DATABASE_URL": url, "KEELSON_ADMIN_TOKEN": token}

    # Flushes far apart: the measured requests count in memory only, as they
    # do between two flushes of a serving process.
    on = create_app(load_config({**base, "KEELSON_DRIFT": "1",
                                 "KEELSON_DRIFT_FLUSH_SECONDS": "3600"}))
    off = create_app(load_config({**base, "KEELSON_DRIFT": "0"}))
    rows = [r["features"] for r in demo_data.generate_records(200, seed=13)]
    predictions = {}
    for explain in ("none", "gradient"):
        progress(f"[{backend}] predictions, explain={explain}, drift on and off")
        paths = [_predict_path(row, explain) for row in rows]
        rates = _alternating_rates({"on": on, "off": off}, paths, token, requests)
        predictions[f"explain_{explain}"] = {
            "drift_on_per_s": round(rates["on"]), "drift_off_per_s": round(rates["off"]),
            "ratio_on_over_off": round(rates["on"] / rates["off"], 3)}

    progress(f"[{backend}] filling the tally table ({writers} writers x {days} days x 24 h)")
    rows_written = _fill_tallies(get_database(on), writers, days)
    # As autovacuum would after such a load: the planner sees the table's size.
    refresh_planner_statistics(get_database(on).engine, "drift_tallies")
    answer_client = on.test_client()
    headers = {"Authorization": f"Bearer {token}"}
    path = f"/v1/models/{demo_data.MODEL_NAME}/drift?window_days={WINDOW_DAYS}"
    _get(answer_client, path, headers)  # reference binned, caches warm
    times = []
    for _ in range(ANSWERS):
        started = time.perf_counter()
        body = _get(answer_client, path, headers)
        times.append(time.perf_counter() - started)
    close_drift_tally(on)
    times.sort()
    return {
        "predictions": predictions,
        "answer": {"tally_rows": rows_written, "rows_in_window": body and _rows_in_window(
            get_database(on), WINDOW_DAYS),
            "median_ms": round(statistics.median(times) * 1000, 2),
            "p95_ms": round(times[int(0.95 * (len(times) - 1))] * 1000, 2),
            "recent_predictions": body["recent_predictions"]},
    }


def _predict_path(row: dict[str, Any], explain: str) -> str:
    query = {k: str(v).lower() if isinstance(v, bool) else v for k, v in row.items()}
    return (f"/v1/models/{demo_data.MODEL_NAME}/predictions?"
            f"{urlencode({**query, 'explain': explain})}")


def _alternating_rates(apps: dict[str, Any], paths: list[str], token: str,
                       requests: int) -> dict[str, float]:
    """Requests per second of each app, measured in ``ROUNDS`` alternating rounds."""
    headers = {"Authorization": f"Bearer {token}"}
    clients = {name: app.test_client() for name, app in apps.items()}
    for client in clients.values():  # warm: versions loaded, references binned
        for path in paths[:20]:
            _get(client, path, headers)
    tally = apps["on"].extensions.get("keelson.drift_tally")
    if tally is not None:
        tally.flush()  # the first requests waited for the reference: count them now
    spent = dict.fromkeys(apps, 0.0)
    per_round = max(1, requests // ROUNDS)
    for _ in range(ROUNDS):
        for name, client in clients.items():
            started = time.perf_counter()
            for i in range(per_round):
                _get(client, paths[i % len(paths)], headers)
            spent[name] += time.perf_counter() - started
    return {name: per_round * ROUNDS / seconds for name, seconds in spent.items()}


def _get(client: Any, path: str, headers: dict[str, str]) -> Any:
    answer = client.get(path, headers=headers)
    if answer.status_code != 200:
        raise RuntimeError(f"GET {path} answered {answer.status_code}: "
                           f"{answer.get_data(as_text=True)[:300]}")
    return answer.get_json()


def _fill_tallies(database: Any, writers: int, days: int) -> int:
    """Rows as ``writers`` processes would write them every hour for ``days``
    days, each with the counts a busy hour gives, for the active version."""
    from sqlalchemy import insert, select

    from service.store.tables import DriftTallyRow, ModelRow
    from service.usecases.drift_reference import read_reference

    with database.read() as session:
        model_id, version_id = session.execute(select(ModelRow.id, ModelRow.active_version_id)
                                               .where(ModelRow.name == demo_data.MODEL_NAME)
                                               ).one()
        bins = read_reference(session, version_id)
    assert bins is not None
    from service.store.drift_tallies import Tally

    predictions = int(bins[0].reference.sum())
    counts = Tally(model_id, version_id, dt.datetime.now(dt.UTC), predictions,
                   [b.reference.tolist() for b in bins]).packed()
    now = dt.datetime.now(dt.UTC).replace(minute=0, second=0, microsecond=0)
    written = 0
    batch: list[dict[str, Any]] = []
    for hour in range(days * 24):
        start = now - dt.timedelta(hours=hour)
        for writer in range(writers):
            batch.append({"model_id": model_id, "version_id": version_id,
                          "bucket_start": start, "writer": f"bench-{writer}",
                          "predictions": predictions, "counts": counts, "updated_at": now})
        if len(batch) >= 2000:
            written += _insert(database, insert(DriftTallyRow), batch)
            batch = []
    if batch:
        written += _insert(database, insert(DriftTallyRow), batch)
    return written


def _insert(database: Any, statement: Any, batch: list[dict[str, Any]]) -> int:
    with database.write() as session:
        session.execute(statement, batch)
        session.commit()
    return len(batch)


def _rows_in_window(database: Any, days: int) -> int:
    from sqlalchemy import func, select

    from service.store.tables import DriftTallyRow

    since = (dt.datetime.now(dt.UTC) - dt.timedelta(days=days)).replace(
        minute=0, second=0, microsecond=0)
    with database.read() as session:
        return int(session.scalar(select(func.count()).select_from(DriftTallyRow).where(
            DriftTallyRow.bucket_start >= since)) or 0)
