"""``keelson bench replay``: rebuilding a version against the engine alone.

For each database (a scratch SQLite file; PostgreSQL when a server URL is
given), ``records`` records of 20 numeric fields are stored and a real
worker process learns them to lag 0 (the same setup as ``keelson bench
worker``, whose helpers this uses); the worker is stopped, so its last
version holds every train record. Then, in this process:

* ``replay``: :func:`rebuild_snapshot` of that version (what ``keelson
  replay`` runs: the records read from the database a chunk per query,
  decoded, encoded and stepped by the worker's code), in train records per
  second, and whether the comparison found it identical;
* ``engine``: ``Learner.learn`` over the same train records already encoded
  in memory (the engine's online rate);
* ``ratio``: replay over engine (the target is at least 0.8);
* ``inline_*``: the same replay with the records read in this process (no
  reader process: what reading ahead is worth).

Both sides run with BLAS held to one thread, as the worker and ``keelson
replay`` do.
"""

from __future__ import annotations

import os
import platform
import resource
import signal
import tempfile
import time
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from service.config import read_setting
from service.tools.bench import worker as worker_bench
from service.tools.bench.scratch import on_each_database

Progress = Callable[[str], None]


def run_replay_bench(records: int = 100_000, postgres_url: str | None = None,
                     progress: Progress = lambda _: None) -> dict[str, Any]:
    """Measure and return one JSON-ready object (see the module docstring)."""
    result: dict[str, Any] = {
        "benchmark": "replay",
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                    "numpy": np.__version__, "platform": platform.platform()},
        "settings": {"records": records, "fields": len(worker_bench.FIELDS),
                     "network": "20-32-16-1", "spec_training": worker_bench.SPEC["training"]},
    }
    postgres_url = postgres_url or read_setting("KEELSON_BENCH_POSTGRES_URL")
    result.update(on_each_database(lambda url: _measure(url, records, progress), postgres_url))
    return result


def _measure(url: str, records: int, progress: Progress) -> dict[str, Any]:
    from threadpoolctl import threadpool_limits

    from engine.snapshot_diff import first_difference
    from service.store.database import make_engine, make_sessionmaker
    from service.store.record_log import decode_json
    from service.store.schema import upgrade_database
    from service.worker.replay import rebuild_snapshot
    from service.worker.settings import WorkerSettings

    backend = url.split(":", 1)[0].split("+", 1)[0]
    upgrade_database(url)
    engine = make_engine(url, json_deserializer=decode_json)
    reads, writes = make_sessionmaker(engine), make_sessionmaker(engine, write=True)
    try:
        progress(f"[{backend}] storing {records} records")
        model_id, last, features, labels, splits = worker_bench._store(writes, records)
        progress(f"[{backend}] a worker learns them (lag 0)")
        log = Path(tempfile.gettempdir()) / f"keelson-bench-replay-{uuid.uuid4().hex[:8]}.log"
        worker = worker_bench._start_worker(url, log)
        try:
            worker_bench._wait(lambda: worker_bench._trainer(reads, model_id)[0] == last, 3600)
        finally:
            worker.send_signal(signal.SIGTERM)
            worker.wait(60)
        version_id, stored = _last_version(reads, model_id)
        chunk = WorkerSettings(database_url=url).chunk_records
        progress(f"[{backend}] replay of the last version")
        load_start = os.getloadavg()[0]
        children = resource.getrusage(resource.RUSAGE_CHILDREN)
        with threadpool_limits(limits=1, user_api="blas"):
            started, cpu = time.perf_counter(), time.process_time()
            rebuilt = rebuild_snapshot(reads, model_id, version_id, chunk)
            seconds, cpu_seconds = time.perf_counter() - started, time.process_time() - cpu
        reader_cpu = _cpu_of(resource.getrusage(resource.RUSAGE_CHILDREN)) - _cpu_of(children)
        begun = time.perf_counter()
        identical = first_difference(stored, rebuilt) is None
        compare_seconds = time.perf_counter() - begun
        progress(f"[{backend}] replay again, reading inline (no second process)")
        with threadpool_limits(limits=1, user_api="blas"):
            started = time.perf_counter()
            inline = rebuild_snapshot(reads, model_id, version_id, chunk,
                                      read_ahead_from=records + 1)
            inline_seconds = time.perf_counter() - started
        identical = identical and first_difference(stored, inline) is None
        progress(f"[{backend}] engine alone")
        train = [i for i, split in enumerate(splits) if split == "train"]
        online, online_cpu, _ = worker_bench._engine_alone(
            [features[i] for i in train], [labels[i] for i in train], 0)
        load_end = os.getloadavg()[0]
    finally:
        engine.dispose()
    n_train = len(train)
    replay_rate, engine_rate = n_train / seconds, n_train / online
    return {
        "train_records": n_train, "all_records": records,
        "identical": identical,
        "replay_seconds": round(seconds, 2),
        "replay_records_per_s": round(replay_rate),
        "engine_learn_records_per_s": round(engine_rate),
        "ratio": round(replay_rate / engine_rate, 3),
        "target_ratio": 0.8,
        # The same replay reading inline: what the second process is worth.
        "inline_records_per_s": round(n_train / inline_seconds),
        "inline_ratio": round(n_train / inline_seconds / engine_rate, 3),
        # CPU seconds of the stepping process (the database server's not
        # counted): less swayed by other load than the wall-clock ratio.
        "replay_cpu_seconds": round(cpu_seconds, 2),
        # The process that reads and encodes a chunk ahead (0 below
        # service/worker/replay_reader.py's PIPELINE_MIN_RECORDS).
        "reader_cpu_seconds": round(reader_cpu, 2),
        "engine_cpu_seconds": round(online_cpu, 2),
        "cpu_ratio": round(online_cpu / cpu_seconds, 3) if cpu_seconds else None,
        "compare_seconds": round(compare_seconds, 3),
        "load_average_1min": [round(load_start, 2), round(load_end, 2)],
    }


def _cpu_of(usage: Any) -> float:
    return float(usage.ru_utime + usage.ru_stime)


def _last_version(reads: Any, model_id: int) -> tuple[int, bytes]:
    from sqlalchemy import select

    from service.store.tables import VersionRow

    with reads() as session:
        row = session.execute(
            select(VersionRow.id, VersionRow.snapshot).where(VersionRow.model_id == model_id)
            .order_by(VersionRow.number.desc()).limit(1)).one()
        return int(row[0]), bytes(row[1])
