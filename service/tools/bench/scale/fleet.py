"""Section "fleet": many models trained online by 1, 2, 3 worker processes.

Each run starts from a copy of the same stored fleet (no version yet) and
real ``keelson worker`` processes. The bench polls the ``trainers`` rows (one
query per poll) and notes, per model, when it was first leased and when its
stored cursor reached its last record (zero lag). Figures:

* ``train_records_per_s``: train records of every model over the time from
  the first lease to the last model at zero lag, beside one model holding
  the same total records, trained by one worker (``one_model``);
* ``longest_wait_s``: the longest any model had lag > 0 (all have lag from the
  start: the backlog drains at the aggregate rate), and
  ``longest_lease_to_zero_lag_s``, the longest once a worker had taken it;
* ``trickle``: with every worker free (each caught-up model released), a few
  records are appended to every model at once; ``longest_wait_s`` is the
  longest any model then waited with lag > 0, to be set against the lease
  period;
* per worker: CPU seconds, resident memory when a quarter of the models were
  at zero lag, at the end of the backlog and after the trickle, and the peak.

Invariants (checked by tests/benchmarks/test_bench_scale.py): every model
reached zero lag, and per model the head version's ``records_seen`` equals
the train records stored (nothing lost, nothing learnt twice).
"""

from __future__ import annotations

import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from service.tools.bench.scale.fleet_data import Fleet, append_records, copy_of, invented_records
from service.tools.bench.scale.workers import (
    cpu_seconds,
    peak_rss_mib,
    rss_mib,
    start_worker,
    stop_worker,
)

Progress = Callable[[str], None]
POLL_SECONDS = 0.05
TRICKLE_RECORDS = 20
WORKER_SETTINGS = {
    # Short quiet times, so a run's end is its work and not waiting; the
    # lease period is the default's (the "2 lease periods" target's unit).
    "KEELSON_WORKER_IDLE_SECONDS": "0.2",
    "KEELSON_WORKER_POLL_SECONDS": "0.02",
    "KEELSON_WORKER_CLAIM_SECONDS": "0.25",
    "KEELSON_WORKER_RELEASE_SECONDS": "1.0",
}


def measure_fleet(template_url: str, fleet: Fleet, workers: int, progress: Progress,
                  keep: Callable[[str], None] | None = None, timeout: float = 7200
                  ) -> dict[str, Any]:
    """One run with ``workers`` processes on a copy of ``template_url``.
    ``keep(url)``, when given, is called with the trained copy before it is dropped."""
    from service.config import setting

    with copy_of(template_url) as url:
        reads, dispose = _sessions(url)
        logs = Path(tempfile.gettempdir())
        processes = [start_worker(url, f"scale-{workers}-{k}",
                                  logs / f"keelson-bench-scale-{workers}-{k}.log",
                                  WORKER_SETTINGS) for k in range(workers)]
        try:
            backlog = _follow(reads, fleet, processes, timeout, progress)
            cpu_backlog = [cpu_seconds(p.pid) for p in processes]
            progress(f"[fleet x{workers}] every model at zero lag; waiting for the releases")
            _wait(lambda: not any(holder for _, holder in _trainers(reads).values()), timeout)
            trickle = _trickle(url, reads, fleet, processes, timeout)
            peaks = [peak_rss_mib(p.pid) for p in processes]
        finally:
            statuses = [stop_worker(p) for p in processes]
        checks = _invariants(reads, fleet)
        dispose()
        if keep is not None:
            keep(url)
    lease = float(setting("KEELSON_WORKER_LEASE_SECONDS").default)
    trickle_rss = trickle.pop("rss_mib")
    return {
        "workers": workers,
        "train_records": backlog["train_records"],
        "seconds_first_lease_to_all_zero_lag": backlog["seconds"],
        "train_records_per_s": backlog["rate"],
        "longest_wait_s": backlog["longest_wait_s"],
        "longest_lease_to_zero_lag_s": backlog["longest_lease_to_zero_lag_s"],
        "trickle": {**trickle, "lease_seconds": lease, "target_longest_wait_s": 2 * lease},
        "per_worker": [
            {"cpu_seconds_backlog": round(cpu, 2), "exit_status": status,
             "rss_mib_quarter_done": backlog["rss_quarter"][k],
             "rss_mib_backlog_done": backlog["rss_end"][k],
             "rss_mib_after_trickle": after, "peak_rss_mib": peak}
            for k, (cpu, status, after, peak) in enumerate(
                zip(cpu_backlog, statuses, trickle_rss, peaks, strict=True))],
        "invariants": checks,
    }


def _sessions(url: str) -> tuple[Any, Callable[[], None]]:
    from service.store.database import make_engine, make_sessionmaker

    engine = make_engine(url)
    return make_sessionmaker(engine), engine.dispose


def _trainers(reads: Any) -> dict[int, tuple[int, str | None]]:
    from sqlalchemy import select

    from service.store.tables import TrainerRow

    with reads() as session:
        rows = session.execute(select(TrainerRow.model_id, TrainerRow.cursor,
                                      TrainerRow.leased_by))
        return {int(m): (int(cursor), holder) for m, cursor, holder in rows}


def _last_seqs(reads: Any) -> dict[int, int]:
    from sqlalchemy import func, select

    from service.store.tables import RecordRow

    with reads() as session:
        rows = session.execute(select(RecordRow.model_id, func.max(RecordRow.seq))
                               .group_by(RecordRow.model_id))
        return {int(m): int(top) for m, top in rows}


def _follow(reads: Any, fleet: Fleet, processes: list[Any], timeout: float,
            progress: Progress) -> dict[str, Any]:
    """Poll until every model is at zero lag; when each was leased and caught up."""
    last = _last_seqs(reads)
    leased: dict[int, float] = {}
    done: dict[int, float] = {}
    rss_quarter: list[float | None] | None = None
    deadline = time.perf_counter() + timeout
    quarter = max(1, len(fleet.ids) // 4)
    while len(done) < len(fleet.ids):
        if time.perf_counter() > deadline:
            raise TimeoutError(f"{len(fleet.ids) - len(done)} models never reached zero lag")
        if any(p.poll() is not None for p in processes):
            raise RuntimeError("a worker exited during the run; see its log in the temp folder")
        now = time.perf_counter()
        for model_id, (cursor, holder) in _trainers(reads).items():
            if holder is not None:
                leased.setdefault(model_id, now)
            if cursor == last[model_id] and model_id not in done:
                done[model_id] = now
                leased.setdefault(model_id, now)
        if rss_quarter is None and len(done) >= quarter:
            rss_quarter = [rss_mib(p.pid) for p in processes]
            progress(f"[fleet x{len(processes)}] {len(done)} of {len(fleet.ids)} at zero lag")
        time.sleep(POLL_SECONDS)
    start = min(leased.values())
    seconds = max(done.values()) - start
    train = _train_records(reads)
    return {"train_records": train, "seconds": round(seconds, 2),
            "rate": round(train / seconds) if seconds > 0 else None,
            "longest_wait_s": round(seconds, 2),
            "longest_lease_to_zero_lag_s": round(max(done[m] - leased[m] for m in done), 2),
            "rss_quarter": rss_quarter or [None] * len(processes),
            "rss_end": [rss_mib(p.pid) for p in processes]}


def _trickle(url: str, reads: Any, fleet: Fleet, processes: list[Any], timeout: float
             ) -> dict[str, Any]:
    """Every worker free: a few records for every model at once; how long each waits."""
    from service.store.database import open_database

    db = open_database(url)
    rng = np.random.default_rng(7)
    try:
        started = time.perf_counter()
        for model_id in fleet.ids:
            append_records(db, model_id, invented_records(rng, TRICKLE_RECORDS))
        stored = time.perf_counter()
    finally:
        db.engine.dispose()
    last = _last_seqs(reads)
    waits: dict[int, float] = {}
    deadline = stored + timeout
    while len(waits) < len(fleet.ids):
        if time.perf_counter() > deadline:
            raise TimeoutError("trickled records were never all learnt")
        now = time.perf_counter()
        for model_id, (cursor, _) in _trainers(reads).items():
            if cursor == last[model_id] and model_id not in waits:
                waits[model_id] = now - stored
        time.sleep(POLL_SECONDS)
    ordered = sorted(waits.values())
    return {"records_per_model": TRICKLE_RECORDS,
            "store_seconds": round(stored - started, 2),
            "longest_wait_s": round(ordered[-1], 2),
            "median_wait_s": round(ordered[len(ordered) // 2], 2),
            "rss_mib": [rss_mib(p.pid) for p in processes]}


def _train_records(reads: Any) -> int:
    from sqlalchemy import func, select

    from service.store.tables import ModelRow

    with reads() as session:
        return int(session.scalar(select(func.sum(ModelRow.records_train))) or 0)


def _invariants(reads: Any, fleet: Fleet) -> dict[str, Any]:
    """Per model: at zero lag, and its head version learnt every train record once."""
    from sqlalchemy import select

    from service.store.tables import ModelRow, TrainerRow, VersionRow

    last = _last_seqs(reads)
    with reads() as session:
        rows = session.execute(
            select(ModelRow.id, ModelRow.records_train, TrainerRow.cursor,
                   VersionRow.records_seen, ModelRow.active_version_id)
            .join(TrainerRow, TrainerRow.model_id == ModelRow.id)
            .outerjoin(VersionRow, VersionRow.id == TrainerRow.head_version_id)
            .where(ModelRow.id.in_(fleet.ids))).all()
    lagging = [m for m, _, cursor, _, _ in rows if cursor != last[m]]
    lost = [m for m, train, _, seen, _ in rows if seen != train]
    return {"models": len(rows), "models_at_zero_lag": len(rows) - len(lagging),
            "models_with_records_seen_equal_to_train_records": len(rows) - len(lost),
            "models_with_an_active_version": sum(1 for *_, active in rows if active),
            "train_records_stored": sum(train for _, train, *_ in rows),
            "train_records_learnt": sum(seen or 0 for *_, seen, _ in rows),
            "mismatched_models": sorted(set(lagging) | set(lost))[:20]}


def _wait(check: Callable[[], bool], timeout: float) -> None:
    deadline = time.perf_counter() + timeout
    while not check():
        if time.perf_counter() > deadline:
            raise TimeoutError(f"benchmark step did not finish within {timeout} s")
        time.sleep(POLL_SECONDS)
