"""``keelson bench track-record``: the track record's cost against its history.

For each database (a scratch SQLite file; PostgreSQL when a server URL is
given): a binary pump model with three versions; ``outcomes`` outcomes (default
200,000) spread evenly over the last 365 days, version 1 then 2 then 3 (the
active one), folded in through ``record_outcomes`` in batches of 1,000, each
batch one transaction holding the model row lock, as the outcomes route does;
then, through the app in this process (the Flask test client: routing, auth,
validation and the answer's JSON, no socket):

* ``record_outcomes_per_second``: outcomes folded into the day sums and alarms
  per second (the track-record part of an outcome batch only: the cases, the
  records and their transaction are the outcomes route's);
* ``summary_ms``: GET /v1/models/{name}/track-record, the default 30-day window
  and the longest one (366 days), median and 95th percentile of ``repeats``;
* ``metrics_scrape_ms``: GET /metrics, with the track-record series;
* ``day_rows``: the stored day rows the answers read from.

Before the answers are timed, ``cases`` scored cases (default 1,000,000) are
stored in bulk, the first ``outcomes`` of them with their outcome: the summary
reads day rows only and never the cases, and this shows it with a history of
that size in the same database (``scored_cases`` reports the count). Served
probabilities and outcomes are invented (uniform scores, outcomes drawn from
them), there only to have numbers to add.
"""

from __future__ import annotations

import datetime as dt
import platform
import statistics
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import click

Progress = Callable[[str], None]
BATCH = 1000
TOKEN = "bench-track-record-admin-token-0123456789"
SPEC: dict[str, Any] = {
    "name": "pump-risk",
    "task": "binary",
    "target": "failed_within_30d",
    "classes": ["ok", "failed"],
    "features": [{"name": "bearing_temp_c", "type": "numeric"},
                 {"name": "vibration_rms", "type": "numeric"}],
}


def run_track_record_bench(outcomes: int = 200_000, repeats: int = 50, cases: int = 1_000_000,
                           postgres_url: str | None = None,
                           progress: Progress = lambda _: None) -> dict[str, Any]:
    """Measure and return one JSON-ready object (see the module docstring)."""
    from service.tools.bench.scratch import scratch_postgres

    result: dict[str, Any] = {"python": platform.python_version(), "outcomes": outcomes,
                              "scored_cases": cases, "batch": BATCH, "repeats": repeats}
    with tempfile.TemporaryDirectory() as folder:
        progress("track record on SQLite ...")
        result["sqlite"] = _measure(f"sqlite:///{Path(folder) / 'bench.db'}", outcomes,
                                    repeats, cases, progress)
    if postgres_url:
        with scratch_postgres(postgres_url) as url:
            progress("track record on PostgreSQL ...")
            result["postgresql"] = _measure(url, outcomes, repeats, cases, progress)
    return result


def _measure(url: str, outcomes: int, repeats: int, cases: int,
             progress: Progress) -> dict[str, Any]:
    import numpy as np
    from sqlalchemy import func, insert, select

    import engine
    from service.store.schema import upgrade_database
    from service.store.tables import ModelRow, ScoredCaseRow, TrackRecordDayRow, VersionRow
    from service.usecases.common import find_model
    from service.usecases.track_record import JoinedOutcome, record_outcomes
    from service.web.app import create_app
    from service.web.extensions import get_database

    upgrade_database(url)
    app = create_app({"KEELSON_DATABASE_URL": url, "KEELSON_ADMIN_TOKEN": TOKEN})
    db = get_database(app)
    try:
        with db.write() as session:
            model = ModelRow(name=SPEC["name"], spec=engine.apply_defaults(SPEC),
                             records_train=0, records_holdout=0)
            session.add(model)
            session.flush()
            versions = []
            for number in (1, 2, 3):
                version = VersionRow(model_id=model.id, number=number, origin="online",
                                     status="active" if number == 3 else "retired",
                                     snapshot=b"not read here", cursor=0, records_seen=0,
                                     metrics={})
                session.add(version)
                session.flush()
                versions.append(version.id)
            model.active_version_id = versions[-1]
            session.commit()
        rng = np.random.default_rng(0)
        now = dt.datetime.now(dt.UTC)
        start = now - dt.timedelta(days=365)
        step = (now - start) / outcomes
        p = rng.uniform(0.0, 1.0, outcomes)
        failed = rng.uniform(size=outcomes) < p
        folding = 0.0
        for first in range(0, outcomes, BATCH):
            joined = []
            for i in range(first, min(first + BATCH, outcomes)):
                q = float(p[i])
                moment = start + step * i
                joined.append(JoinedOutcome(
                    version_id=versions[min(3 * i // outcomes, 2)],
                    output={"label": "failed" if q > 0.5 else "ok",
                            "probabilities": {"ok": 1.0 - q, "failed": q}},
                    label="failed" if failed[i] else "ok",
                    scored_at=moment - dt.timedelta(days=30), outcome_at=moment))
            began = time.perf_counter()
            with db.write() as session, session.begin():
                record_outcomes(session, find_model(session, SPEC["name"], lock=True), joined)
            folding += time.perf_counter() - began
            if first and first % 50_000 == 0:
                progress(f"  {first:,} outcomes folded in")
        progress(f"  storing {cases:,} scored cases ...")
        for first in range(0, cases, 10_000):
            rows = [{"model_id": model.id, "key": f"case-{i}", "version_id": versions[-1],
                     "features": {"bearing_temp_c": 60.0, "vibration_rms": 3.0},
                     "output": {"label": "ok", "probabilities": {"ok": 0.9, "failed": 0.1}},
                     "scored_at": start, "outcome": "ok" if i < outcomes else None,
                     "outcome_at": now if i < outcomes else None}
                    for i in range(first, min(first + 10_000, cases))]
            with db.write() as session, session.begin():
                session.execute(insert(ScoredCaseRow), rows)
        with db.read() as session:
            day_rows = int(session.scalar(select(func.count()).select_from(TrackRecordDayRow))
                           or 0)
        client = app.test_client()
        headers = {"Authorization": f"Bearer {TOKEN}"}
        path = f"/v1/models/{SPEC['name']}/track-record"
        longest = f"{path}?since={(now - dt.timedelta(days=365)).date()}&until={now.date()}"
        return {
            "record_outcomes_per_second": round(outcomes / folding),
            "day_rows": day_rows,
            "summary_ms": {
                "default_30_days": _time(lambda: client.get(path, headers=headers), repeats),
                "window_366_days": _time(lambda: client.get(longest, headers=headers),
                                         repeats),
            },
            "metrics_scrape_ms": _time(lambda: client.get("/metrics"), repeats),
        }
    finally:
        db.engine.dispose()


def _time(call: Callable[[], Any], repeats: int) -> dict[str, float]:
    answer = call()  # warm: the first request builds caches
    assert answer.status_code == 200, answer.get_data(as_text=True)
    times = []
    for _ in range(repeats):
        began = time.perf_counter()
        answer = call()
        times.append((time.perf_counter() - began) * 1000.0)
        assert answer.status_code == 200
    times.sort()
    return {"median": round(statistics.median(times), 2),
            "p95": round(times[min(len(times) - 1, int(0.95 * len(times)))], 2)}


@click.command("track-record")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--outcomes", type=click.IntRange(min=BATCH), default=200_000, show_default=True,
              help="Outcomes folded in before the answers are timed.")
@click.option("--repeats", type=click.IntRange(min=5), default=50, show_default=True)
@click.option("--cases", type=click.IntRange(min=0), default=1_000_000, show_default=True,
              help="Scored cases stored beside them (the first --outcomes with an outcome).")
@click.option("--postgres-url", default=None,
              help="Also measure on this PostgreSQL server (a scratch database is made) "
                   "[env KEELSON_BENCH_POSTGRES_URL].")
def bench_track_record(as_json: bool, outcomes: int, repeats: int, cases: int,
                       postgres_url: str | None) -> None:
    """Track-record and /metrics answer times with a year of outcomes stored."""
    from service.tools.bench import commands
    from service.tools.report import emit

    emit(run_track_record_bench(outcomes=outcomes, repeats=repeats, cases=cases,
                                 postgres_url=postgres_url or commands._bench_postgres_url(),
                                 progress=commands._progress), as_json)
