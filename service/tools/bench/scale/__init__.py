"""``keelson bench scale``: how cost grows with models, records and versions.

One module per section (fleet.py, predictions.py); run_scale_bench
stores the invented fleet once (fleet_data.py) on a scratch SQLite file, or
on a scratch PostgreSQL database when a server URL is given, and each
section measures on copies of it. The sections "retrain" (a retrain over
millions of records, bench/retrain.py) and "storage" (bytes per million
records, bench/storage.py) make their own scratch databases on the same
backend: they are the benches ``keelson bench retrain`` and ``keelson bench
storage`` run as parts of this one. Sizes are options, so CI runs it small and
the README's figures run it at full size.
"""

from __future__ import annotations

import contextlib
import os
import platform
import tempfile
import time
from collections.abc import Callable, Iterator
from typing import Any

import numpy as np

from service.tools.bench.scale.fleet_data import Fleet, copy_of, store_fleet

Progress = Callable[[str], None]
SECTIONS = ("fleet", "predictions", "retrain", "storage")


def run_scale_bench(models: int = 500, min_records: int = 200, max_records: int = 2000,
                    workers: tuple[int, ...] = (1, 2, 3), postgres_url: str | None = None,
                    sections: tuple[str, ...] = SECTIONS, duration: int = 10,
                    connections: int = 16, retrain_records: int = 5_000_000,
                    storage_records: int = 50_000, progress: Progress = lambda _: None
                    ) -> dict[str, Any]:
    rng = np.random.default_rng(2026)
    counts = [int(n) for n in rng.integers(min_records, max_records + 1, size=models)]
    result: dict[str, Any] = {
        "benchmark": "scale",
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                    "platform": platform.platform(),
                    "load_average_1m_at_start": round(os.getloadavg()[0], 2)},
        "settings": {"models": models, "min_records": min_records, "max_records": max_records,
                     "records": sum(counts), "workers": list(workers),
                     "sections": list(sections), "retrain_records": retrain_records,
                     "storage_records": storage_records},
    }
    if "fleet" in sections or "predictions" in sections:
        _many_models(result, counts, workers, postgres_url, sections, duration, connections,
                     progress)
    if "retrain" in sections:
        from service.tools.bench.retrain import run_retrain_bench

        result["retrain"] = run_retrain_bench(records=retrain_records, postgres_url=postgres_url,
                                              sqlite=postgres_url is None, progress=progress)
    if "storage" in sections:
        from service.tools.bench.storage import run_storage_bench

        result["storage"] = run_storage_bench(records=storage_records, postgres_url=postgres_url,
                                              progress=progress)
    result["machine"]["load_average_1m_at_end"] = round(os.getloadavg()[0], 2)
    return result


def _many_models(result: dict[str, Any], counts: list[int], workers: tuple[int, ...],
                 postgres_url: str | None, sections: tuple[str, ...], duration: int,
                 connections: int, progress: Progress) -> None:
    from service.tools.bench.scale.fleet import measure_fleet
    from service.tools.bench.scale.predictions import measure_predictions

    models = len(counts)
    with _scratch(postgres_url) as (backend, base):
        result["database"] = backend
        progress(f"[{backend}] storing {models} models, {sum(counts)} records")
        started = time.perf_counter()
        fleet = store_fleet(base, counts, "station")
        result["settings"]["store_seconds"] = round(time.perf_counter() - started, 2)
        trained: list[str] = []
        with contextlib.ExitStack() as keep:
            def kept(url: str) -> None:
                if not trained:  # the first trained copy serves the predictions section
                    trained.append(keep.enter_context(copy_of(url)))
            result["fleet"] = _fleet(base, fleet, workers, progress, kept, measure_fleet)
            if "predictions" in sections:
                result["predictions"] = measure_predictions(trained[0], fleet.names, duration,
                                                            connections, progress)


def _fleet(base: str, fleet: Fleet, workers: tuple[int, ...], progress: Progress,
           kept: Callable[[str], None], measure: Callable[..., dict[str, Any]]
           ) -> dict[str, Any]:
    runs = []
    for count in workers:
        progress(f"[fleet] {len(fleet.ids)} models, {count} worker(s)")
        run = measure(base, fleet, count, progress, keep=kept)
        progress(f"[fleet] {count} worker(s): {run['train_records_per_s']} train records/s, "
                 f"longest wait {run['longest_wait_s']} s, trickle "
                 f"{run['trickle']['longest_wait_s']} s, peak RSS "
                 f"{[w['peak_rss_mib'] for w in run['per_worker']]} MiB")
        runs.append(run)
    progress(f"[fleet] one model holding the same {fleet.total} records, 1 worker")
    with _one_model_template(base, fleet.total) as (one_url, one):
        baseline = measure(one_url, one, 1, progress)
    one_rate = baseline["train_records_per_s"] or float("nan")
    for run in runs:
        run["ratio_to_one_model"] = round((run["train_records_per_s"] or 0) / one_rate, 3)
    first = runs[0]["train_records_per_s"] or float("nan")
    return {"runs": runs, "one_model": baseline,
            "speedup_over_one_worker": {str(r["workers"]): round(
                (r["train_records_per_s"] or 0) / first, 3) for r in runs},
            "target_ratio_one_worker": 0.5}


@contextlib.contextmanager
def _one_model_template(base: str, records: int) -> Iterator[tuple[str, Fleet]]:
    with _sibling(base) as url:
        yield url, store_fleet(url, [records], "one-station", seed=2027)


@contextlib.contextmanager
def _sibling(base: str) -> Iterator[str]:
    """Another empty, migrated scratch database beside ``base``."""
    from service.store.schema import upgrade_database

    if base.startswith("sqlite:///"):
        path = base.removeprefix("sqlite:///") + ".one"
        try:
            upgrade_database(f"sqlite:///{path}")
            yield f"sqlite:///{path}"
        finally:
            with contextlib.suppress(OSError):
                os.remove(path)
        return
    from service.tools.bench.scratch import scratch_postgres

    with scratch_postgres(base) as url:
        upgrade_database(url)
        yield url


@contextlib.contextmanager
def _scratch(postgres_url: str | None) -> Iterator[tuple[str, str]]:
    from service.store.schema import upgrade_database
    from service.tools.bench.scratch import scratch_postgres

    if postgres_url:
        with scratch_postgres(postgres_url) as url:
            upgrade_database(url)
            yield "postgresql", url
        return
    with tempfile.TemporaryDirectory(prefix="keelson-bench-scale-") as scratch:
        url = f"sqlite:///{scratch}/scale.db"
        upgrade_database(url)
        yield "sqlite", url
