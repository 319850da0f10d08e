"""``keelson bench page``: server time per page with a long history stored.

For each database (a scratch SQLite file; PostgreSQL when a server URL is
given): a binary pump model with ``versions`` versions (default 500, every one
with holdout and prequential figures, a promotion event for each tenth, one
serving) and ``records`` records (default 1,000,000), stored in bulk (this
measures reading them, not ingesting them: the snapshot is one trained network
shared by every version row, and the records are invented values, there only
to be counted). Then, through the app in this process (the Flask test client:
routing, the session check, the queries, the templates; no socket), a signed-in
admin session asks each page ``repeats`` times after one warm-up request:

* ``overview``: GET /;
* ``model``: GET /models/{name} (the 500-row versions table, the curve, drift);
* ``what_if``: GET /models/{name}/what-if (the form, prefilled);
* ``what_if_scored``: the same with a case sent (the prediction, its
  attribution and the sweeps).

Each is reported as the median and 95th percentile in milliseconds; the
budget is 100 ms at the 95th percentile (issue 11). ``assets_bytes`` is the
JavaScript and CSS a page may load (budget 250 KB).
"""

from __future__ import annotations

import datetime as dt
import platform
import re
import statistics
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

Progress = Callable[[str], None]
TOKEN = "bench-page-admin-token-0123456789abcdef"
NAME = "pump-risk"
SPEC: dict[str, Any] = {
    "name": NAME, "task": "binary", "target": "failed_within_30d", "classes": ["ok", "failed"],
    "features": [
        {"name": "vibration_rms", "type": "numeric", "min": 0, "max": 40, "unit": "mm/s"},
        {"name": "bearing_temp_c", "type": "numeric", "min": -10, "max": 120, "unit": "°C"},
        {"name": "pump_family", "type": "categorical", "levels": ["centrifugal", "screw"]},
        {"name": "has_vfd", "type": "boolean"}],
}
CHUNK = 20_000
PAGES = {
    "overview": "/",
    "model": f"/models/{NAME}",
    "what_if": f"/models/{NAME}/what-if",
    "what_if_scored": f"/models/{NAME}/what-if?vibration_rms=12.5&bearing_temp_c=71"
                      "&pump_family=screw&has_vfd=true&show=1",
}


def run_page_bench(records: int = 1_000_000, versions: int = 500, repeats: int = 50,
                   postgres_url: str | None = None, progress: Progress = lambda _: None
                   ) -> dict[str, Any]:
    """Measure and return one JSON-ready object (see the module docstring)."""
    from service.tools.bench.scratch import scratch_postgres
    from service.web.pages.assets import FILES

    result: dict[str, Any] = {
        "python": platform.python_version(), "records": records, "versions": versions,
        "repeats": repeats, "budget_p95_ms": 100,
        "assets_bytes": sum(path.stat().st_size for path in FILES.values())}
    with tempfile.TemporaryDirectory() as folder:
        progress("pages on SQLite ...")
        result["sqlite"] = _measure(f"sqlite:///{Path(folder) / 'bench.db'}", records,
                                    versions, repeats, progress)
    if postgres_url:
        with scratch_postgres(postgres_url) as url:
            progress("pages on PostgreSQL ...")
            result["postgresql"] = _measure(url, records, versions, repeats, progress)
    return result


def _measure(url: str, records: int, versions: int, repeats: int,
             progress: Progress) -> dict[str, Any]:
    from service.store.schema import upgrade_database
    from service.web.app import create_app
    from service.web.extensions import get_database

    upgrade_database(url)
    app = create_app({"KEELSON_DATABASE_URL": url, "KEELSON_ADMIN_TOKEN": TOKEN})
    try:
        _store(app, records, versions, progress)
        client = app.test_client()
        form = client.get("/sign-in").get_data(as_text=True)
        csrf = re.search(r'name="csrf_token" value="([^"]+)"', form)
        assert csrf is not None
        signed = client.post("/sign-in", data={"token": TOKEN, "csrf_token": csrf.group(1)})
        assert signed.status_code == 303, signed.status_code
        figures: dict[str, Any] = {}
        for page, path in PAGES.items():
            assert client.get(path).status_code == 200, path  # warm: caches, templates
            times = []
            for _ in range(repeats):
                began = time.perf_counter()
                response = client.get(path)
                times.append((time.perf_counter() - began) * 1000)
                assert response.status_code == 200, path
            times.sort()
            figures[page] = {"median_ms": round(statistics.median(times), 2),
                             "p95_ms": round(times[max(0, int(0.95 * len(times)) - 1)], 2),
                             "bytes": len(response.data)}
            progress(f"  {page}: p95 {figures[page]['p95_ms']} ms")
        return figures
    finally:
        get_database(app).engine.dispose()


def _store(app: Any, records: int, versions: int, progress: Progress) -> None:
    """The model, its versions and records, in bulk (see the module docstring)."""
    import numpy as np
    from sqlalchemy import insert, update

    import engine
    from service.store.model_events import CREATED, PROMOTED
    from service.store.tables import (
        ModelEventRow,
        ModelRow,
        RecordRow,
        TrainerRow,
        VersionRow,
    )
    from service.web.extensions import get_database

    spec = engine.apply_defaults(SPEC)
    rng = np.random.default_rng(5)
    rows: list[dict[str, Any]] = [{"vibration_rms": float(v), "bearing_temp_c": float(t),
             "pump_family": "screw" if s else "centrifugal", "has_vfd": bool(f)}
            for v, t, s, f in zip(rng.uniform(0, 40, 500), rng.uniform(-10, 120, 500),
                                  rng.random(500) < 0.5, rng.random(500) < 0.5, strict=True)]
    labels = ["failed" if float(r["vibration_rms"]) / 20 + (0 if r["has_vfd"] else 0.5) > 1.2
              else "ok" for r in rows]
    learner = engine.Learner.create(spec, warmup=rows, warmup_labels=labels)
    learner.learn(learner.encode(rows), learner.encode_labels(labels))
    snapshot = learner.to_bytes()
    db = get_database(app)
    now = dt.datetime.now(dt.UTC)
    with db.write() as session:
        model = ModelRow(name=NAME, spec=spec, records_train=0, records_holdout=0)
        session.add(model)
        session.flush()
        model_id = model.id
        session.add(TrainerRow(model_id=model_id, cursor=0))
        session.add(ModelEventRow(model_id=model_id, kind=CREATED, at_seq=0,
                                  details={"settings": {}}))
        session.commit()
    progress(f"  storing {versions} versions ...")
    step = max(1, records // versions)
    with db.write() as session:
        session.execute(insert(VersionRow), [{
            "model_id": model_id, "number": n, "origin": "online",
            "status": "active" if n == versions else "retired", "snapshot": snapshot,
            "cursor": n * step, "records_seen": n * step, "created_at": now,
            "metrics": {"holdout": {"n": 2000, "log_loss": 0.2 + 0.3 / n, "accuracy": 0.9},
                        "prequential": {"n": n * step, "log_loss": 0.25 + 0.3 / n}}}
            for n in range(1, versions + 1)])
        session.execute(insert(ModelEventRow), [{
            "model_id": model_id, "kind": PROMOTED, "token": "operations", "at_seq": n * step,
            "reason": f"better on the holdout window ({n})", "created_at": now,
            "details": {"version": n, "automatic": False, "replaced": None}}
            for n in range(10, versions + 1, 10)])
        session.commit()
    progress(f"  storing {records:,} records ...")
    for first in range(0, records, CHUNK):
        batch = [{"model_id": model_id, "key": None, "features": rows[i % len(rows)],
                  "label": labels[i % len(rows)], "split": "holdout" if i % 5 == 0 else "train",
                  "received_at": now} for i in range(first, min(first + CHUNK, records))]
        with db.write() as session:
            session.execute(insert(RecordRow), batch)
            session.commit()
    with db.write() as session:
        active = session.scalar(VersionRow.__table__.select().with_only_columns(
            VersionRow.id).where(VersionRow.model_id == model_id,
                                 VersionRow.number == versions))
        holdout = (records + 4) // 5
        session.execute(update(ModelRow).where(ModelRow.id == model_id).values(
            active_version_id=active, records_train=records - holdout,
            records_holdout=holdout))
        session.execute(update(TrainerRow).where(TrainerRow.model_id == model_id).values(
            cursor=versions * step))
        session.commit()

