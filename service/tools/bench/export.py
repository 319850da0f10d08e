"""``keelson bench export``: taking the records out (GET /v1/models/{name}/records).

For each database (a scratch SQLite file; PostgreSQL when a server URL is
given), ``records`` records are stored through the ingest path
(``store_records``, 10,000 a transaction) for an invented pump model of 8
fields (6 numeric, a categorical, a boolean) with keys, then exported:

* ``csv`` and ``ndjson``: records per second of the export use case itself,
  every byte produced (what ``keelson export`` writes);
* ``http_ndjson``: the same through the Flask app (its test client, the
  streamed answer read to the end; no sockets, no gunicorn);
* ``peak_traced_mib``: the most memory Python held during a CSV export
  (tracemalloc, a separate run: tracing slows it), for ``records`` and for a
  quarter of them: flat memory means both figures are about the same.
"""

from __future__ import annotations

import os
import platform
import time
import tracemalloc
from collections.abc import Callable, Mapping
from functools import partial
from typing import Any

import numpy as np

from service.config import read_setting
from service.store.database import transaction
from service.tools.bench.scratch import on_each_database

Progress = Callable[[str], None]
INSERT_BATCH = 10_000
TOKEN = "bench-export-token"
NUMERIC = ["flow_m3h", "head_m", "power_kw", "vibration_rms", "bearing_temp_c", "run_hours"]
SPEC: dict[str, Any] = {
    "name": "bench-export",
    "task": "binary",
    "target": "failed_within_30d",
    "classes": ["ok", "failed"],
    "features": [*({"name": name, "type": "numeric"} for name in NUMERIC),
                 {"name": "pump_family", "type": "categorical",
                  "levels": ["centrifugal", "screw", "lobe"]},
                 {"name": "has_vfd", "type": "boolean"}],
}


def run_export_bench(records: int = 200_000, postgres_url: str | None = None,
                     progress: Progress = lambda _: None) -> dict[str, Any]:
    """Measure and return one JSON-ready object (see the module docstring)."""
    result: dict[str, Any] = {
        "benchmark": "export",
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                    "platform": platform.platform()},
        "settings": {"records": records, "fields": len(SPEC["features"])},
    }
    postgres_url = postgres_url or read_setting("KEELSON_BENCH_POSTGRES_URL")
    result.update(on_each_database(lambda url: _measure(url, records, progress), postgres_url))
    return result


def _measure(url: str, records: int, progress: Progress) -> dict[str, Any]:
    from service.store.database import make_engine, make_sessionmaker
    from service.store.record_dump import RecordFilter
    from service.store.schema import upgrade_database
    from service.usecases.record_export import open_export

    backend = url.split(":", 1)[0].split("+", 1)[0]
    upgrade_database(url)
    engine = make_engine(url)
    try:
        reads = make_sessionmaker(engine)
        progress(f"[{backend}] storing {records} records")
        started = time.perf_counter()
        _store(make_sessionmaker(engine, write=True), records)
        figures: dict[str, Any] = {"store_seconds": round(time.perf_counter() - started, 2)}

        def export(format: str, limit: int | None = None) -> tuple[float, int]:
            begun = time.perf_counter()
            size = sum(len(data) for data in open_export(
                reads, SPEC["name"], format, RecordFilter(), limit=limit).chunks())
            return time.perf_counter() - begun, size

        export("csv", limit=10_000)  # warm: queries compiled, caches filled
        for format in ("csv", "ndjson"):
            progress(f"[{backend}] export {format}")
            seconds, size = export(format)
            figures[format] = {"seconds": round(seconds, 3),
                               "records_per_second": round(records / seconds),
                               "mib": round(size / 2**20, 1)}
        progress(f"[{backend}] export ndjson through the app")
        seconds = _through_app(url)
        figures["http_ndjson"] = {"seconds": round(seconds, 3),
                                  "records_per_second": round(records / seconds)}
        progress(f"[{backend}] memory (tracemalloc)")
        figures["peak_traced_mib"] = {
            str(count): _peak_mib(partial(export, "csv", limit=count))
            for count in (records // 4, records)}
    finally:
        engine.dispose()
    return figures


def _peak_mib(run: Callable[[], Any]) -> float:
    tracemalloc.start()
    try:
        run()
        return round(tracemalloc.get_traced_memory()[1] / 2**20, 1)
    finally:
        tracemalloc.stop()


def _through_app(url: str) -> float:
    from service.web.app import create_app
    from service.web.extensions import get_database

    app = create_app({"KEELSON_DATABASE_URL": url, "KEELSON_ADMIN_TOKEN": TOKEN})
    try:
        client = app.test_client()
        begun = time.perf_counter()
        response = client.get(f"/v1/models/{SPEC['name']}/records?format=ndjson",
                              headers={"Authorization": f"Bearer {TOKEN}"}, buffered=False)
        assert response.status_code == 200, response.status_code
        for _ in response.iter_encoded():
            pass
        response.close()
        return time.perf_counter() - begun
    finally:
        get_database(app).engine.dispose()


def _store(writes: Any, records: int) -> None:
    import engine
    from service.store.tables import ModelRow, TrainerRow
    from service.usecases.common import find_model
    from service.usecases.records import store_records

    rng = np.random.default_rng(2026)
    with transaction(writes) as session:
        model = ModelRow(name=SPEC["name"], spec=engine.apply_defaults(SPEC),
                         records_train=0, records_holdout=0)
        session.add(model)
        session.flush()
        session.add(TrainerRow(model_id=model.id, cursor=0))
    families = SPEC["features"][len(NUMERIC)]["levels"]
    for start in range(0, records, INSERT_BATCH):
        n = min(INSERT_BATCH, records - start)
        values = rng.normal(50, 15, size=(n, len(NUMERIC))).tolist()
        batch: list[Mapping[str, Any]] = [
                 {"key": f"station-{(start + i) % 40:02d}/week-{start + i}",
                  "features": {**dict(zip(NUMERIC, row, strict=True)),
                               "pump_family": families[i % 3], "has_vfd": bool(i % 2)},
                  "label": "failed" if row[3] > 70 else "ok"}
                 for i, row in enumerate(values)]
        with transaction(writes) as session:
            store_records(session, find_model(session, SPEC["name"], lock=True), batch)
