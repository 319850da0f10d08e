"""``keelson bench worker``: the training worker against the engine alone.

For each database (a scratch SQLite file; PostgreSQL when a server URL is
given), ``records`` records of 20 numeric fields are stored (one Core
executemany per 10,000 rows, split train/holdout as ingest does), then a real
worker process (``python -m service.worker``) is started and measured:

* ``online``: records per second from the moment it leases the model until
  ``lag == 0`` (its stored cursor is the last record), warm-up, holdout
  evaluation, versions every ``checkpoint_every`` records and the final idle
  version included; beside the engine's pure online rate in this process
  (``Learner.learn`` over the same train records, already encoded in memory);
* ``retrain``: a full retrain job from claim to finish (streaming the records
  from the database, encoding, the batch fit with early stopping, evaluation,
  the version) beside ``Learner.fit`` alone on the same train records already
  encoded in memory, run for exactly as many epochs as the job ran;
* ``peak_rss_mib``: the worker process's peak resident set (VmHWM) after
  catching up, and again after the retrain.

The network is 20-32-16-1 (binary, tanh, SGD). The labels are invented: a
noisy linear rule, there only so the network has something to learn.
"""

from __future__ import annotations

import os
import platform
import signal
import subprocess
import sys
import tempfile
import time
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from service.config import read_setting
from service.store.database import transaction
from service.tools.bench.scratch import on_each_database

Progress = Callable[[str], None]
FIELDS = [f"f{i:02d}" for i in range(20)]
INSERT_BATCH = 10_000
ROOT = Path(__file__).resolve().parents[2]
WORKER_SETTINGS = {
    "KEELSON_WORKER_IDLE_SECONDS": "0.2",
    "KEELSON_WORKER_POLL_SECONDS": "0.02",
    "KEELSON_WORKER_CHUNK_RECORDS": "1000",
}
SPEC: dict[str, Any] = {
    "name": "bench-worker",
    "task": "binary",
    "target": "label",
    "features": [{"name": name, "type": "numeric"} for name in FIELDS],
    "hidden_layers": [32, 16],
    "activation": "tanh",
    "promotion": "auto",
    "training": {"optimizer": "sgd", "learning_rate": 0.01, "momentum": 0.9,
                 "checkpoint_every": 1000, "holdout_fraction": 0.2, "seed": 0,
                 "batch_size": 64, "max_epochs": 200, "patience": 10},
}


def run_worker_bench(
    database_url: str | None = None,
    records: int = 100_000,
    postgres_url: str | None = None,
    progress: Progress = lambda _: None,
    retrain: bool = True,
) -> dict[str, Any]:
    """Measure and return one JSON-ready object (see the module docstring).

    ``database_url``: measure on that (empty, scratch) database only;
    otherwise a scratch SQLite file, and PostgreSQL on a scratch database of
    ``postgres_url`` (or ``KEELSON_BENCH_POSTGRES_URL``) when given.
    ``retrain=False`` measures the online part only (for large record counts).
    """
    result: dict[str, Any] = {
        "benchmark": "worker",
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                    "numpy": np.__version__, "platform": platform.platform()},
        "settings": {"records": records, "fields": len(FIELDS), "network": "20-32-16-1",
                     "spec_training": SPEC["training"], "worker": WORKER_SETTINGS},
    }
    if database_url:
        result["database"] = _measure(database_url, records, progress, retrain)
        return result
    postgres_url = postgres_url or read_setting("KEELSON_BENCH_POSTGRES_URL")
    result.update(on_each_database(lambda url: _measure(url, records, progress, retrain),
                                   postgres_url))
    return result


def _measure(url: str, records: int, progress: Progress, retrain: bool) -> dict[str, Any]:
    from service.store.database import make_engine, make_sessionmaker
    from service.store.record_log import decode_json
    from service.store.schema import upgrade_database

    backend = url.split(":", 1)[0].split("+", 1)[0]
    upgrade_database(url)
    engine = make_engine(url, json_deserializer=decode_json)
    reads, writes = make_sessionmaker(engine), make_sessionmaker(engine, write=True)
    progress(f"[{backend}] storing {records} records")
    started = time.perf_counter()
    model_id, last, features, labels, splits = _store(writes, records)
    figures: dict[str, Any] = {"store_seconds": round(time.perf_counter() - started, 2)}

    progress(f"[{backend}] worker: online until lag 0")
    log = Path(tempfile.gettempdir()) / f"keelson-bench-worker-{uuid.uuid4().hex[:8]}.log"
    worker = _start_worker(url, log)
    try:
        leased = _wait(lambda: _trainer(reads, model_id)[1] is not None, 120)
        cpu_start = _cpu_seconds(worker.pid)
        load_start = os.getloadavg()[0]
        _wait(lambda: _trainer(reads, model_id)[0] == last, 3600)
        online_seconds = time.perf_counter() - leased
        online_cpu = _cpu_seconds(worker.pid) - cpu_start
        load_end = os.getloadavg()[0]
        rss_online = _peak_rss_mib(worker.pid)

        job_id = status = job_seconds = job_error = rss_retrain = None
        if retrain:
            progress(f"[{backend}] worker: full retrain")
            job_id = _queue_retrain(writes, model_id)
            _wait(lambda: _job(reads, job_id)[0] in ("succeeded", "failed"), 3600)
            status, job_seconds, job_error = _job(reads, job_id)
            rss_retrain = _peak_rss_mib(worker.pid)
    finally:
        worker.send_signal(signal.SIGTERM)
        worker.wait(60)

    progress(f"[{backend}] engine alone: online and batch")
    train = [i for i, split in enumerate(splits) if split == "train"]
    epochs = _job_epochs(reads, job_id) if job_id is not None else 0
    online_engine, online_engine_cpu, fit_engine = _engine_alone(
        [features[i] for i in train], [labels[i] for i in train], epochs)
    n_train = len(train)
    worker_rate = n_train / online_seconds
    engine.dispose()
    figures.update({
        "online": {
            "train_records": n_train, "all_records": records,
            "worker_seconds_to_lag_0": round(online_seconds, 2),
            "worker_train_records_per_s": round(worker_rate),
            "worker_all_records_per_s": round(records / online_seconds),
            "engine_learn_records_per_s": round(n_train / online_engine),
            "ratio": round(worker_rate / (n_train / online_engine), 3),
            "target_ratio": 0.4,
            # CPU seconds of the worker process (the database server's not
            # counted) against the engine's: less swayed by other load.
            "worker_cpu_seconds": round(online_cpu, 2),
            "engine_cpu_seconds": round(online_engine_cpu, 2),
            "cpu_ratio": round(online_engine_cpu / online_cpu, 3) if online_cpu else None,
            "load_average_1min": [round(load_start, 2), round(load_end, 2)],
        },
        "retrain": None if not retrain else {
            "job_status": status, "job_error": job_error,
            "worker_job_seconds": None if job_seconds is None else round(job_seconds, 2),
            "engine_fit_seconds": round(fit_engine, 2),
            "ratio": None if not job_seconds else round(fit_engine / job_seconds, 3),
            "target_ratio": 0.8,
            "epochs": epochs,
        },
        "peak_rss_mib": {"after_online": rss_online, "after_retrain": rss_retrain},
    })
    return figures


def _store(writes: Any, records: int) -> tuple[int, int, list[dict[str, float]], list[bool],
                                               list[str]]:
    from sqlalchemy import Table, insert

    import engine
    from service.store.tables import ModelRow, RecordRow, TrainerRow, utcnow
    from service.usecases.records import split_of

    rng = np.random.default_rng(2026)
    direction = rng.normal(size=len(FIELDS))
    spec = engine.apply_defaults(SPEC)
    with transaction(writes) as session:
        model = ModelRow(name=SPEC["name"], spec=spec, records_train=0, records_holdout=0)
        session.add(model)
        session.flush()
        session.add(TrainerRow(model_id=model.id, cursor=0))
        model_id = model.id
    features: list[dict[str, float]] = []
    labels: list[bool] = []
    splits: list[str] = []
    seq = 0
    for start in range(0, records, INSERT_BATCH):
        n = min(INSERT_BATCH, records - start)
        X = rng.normal(size=(n, len(FIELDS)))
        y = (X @ direction + rng.normal(size=n)) > 0
        rows = []
        now = utcnow()
        for row, label in zip(X.tolist(), y.tolist(), strict=True):
            seq += 1
            record = dict(zip(FIELDS, row, strict=True))
            split = split_of(model_id, None, seq, 0.2)
            features.append(record)
            labels.append(label)
            splits.append(split)
            rows.append({"seq": seq, "model_id": model_id, "key": None, "features": record,
                         "label": label, "split": split, "received_at": now})
        with transaction(writes) as session:
            table = RecordRow.__table__
            assert isinstance(table, Table)
            session.execute(insert(table), rows)
    with transaction(writes) as session:
        stored = session.get(ModelRow, model_id)
        assert stored is not None
        model = stored
        model.records_holdout = splits.count("holdout")
        model.records_train = records - model.records_holdout
        if session.get_bind().dialect.name == "postgresql":  # explicit seqs: move it on
            from sqlalchemy import text

            session.execute(text("SELECT setval(pg_get_serial_sequence('records', 'seq'), "
                                 ":top)"), {"top": seq})
            # The statistics autovacuum gathers within a minute of a bulk load.
            # Measured without them, the worker's first reads are planned for a
            # near-empty table (a bitmap scan and sort of every record after the
            # cursor: ~35 ms per 1,000-record chunk at 100k rows instead of <1 ms),
            # which is the load's cold start, not the worker's steady rate.
            session.execute(text("ANALYZE records"))
    return model_id, seq, features, labels, splits


def _engine_alone(features: list[dict[str, float]], labels: list[bool],
                  epochs: int) -> tuple[float, float, float]:
    """Seconds for Learner.learn over every train record, and for Learner.fit
    over them for ``epochs`` epochs (no early stop: the same work as the job).

    BLAS is held to one thread here, as the worker process holds it
    (service/process.py): both sides of each ratio run under the same setting.
    Unpinned, the batch fit took up to twice as long on 2 cores, which made
    the retrain ratio look better than the worker is."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        return _engine_alone_timed(features, labels, epochs)


def _engine_alone_timed(features: list[dict[str, float]], labels: list[bool],
                        epochs: int) -> tuple[float, float, float]:
    from engine import Learner, apply_defaults

    spec = apply_defaults(SPEC)
    spec["training"].update(max_epochs=max(epochs, 1), patience=max(epochs, 1))
    warm = spec["training"]["warmup_records"]
    learner = Learner.create(spec, warmup=features[:warm], warmup_labels=labels[:warm])
    X, Y = learner.encode(features), learner.encode_labels(labels)
    started, cpu = time.perf_counter(), time.process_time()
    learner.learn(X, Y)
    online, online_cpu = time.perf_counter() - started, time.process_time() - cpu
    if not epochs:
        return online, online_cpu, 0.0
    fresh = Learner.create(spec, warmup=features[:warm], warmup_labels=labels[:warm])
    started = time.perf_counter()
    fresh.fit(X, Y)
    return online, online_cpu, time.perf_counter() - started


def _start_worker(url: str, log: Path) -> subprocess.Popen[bytes]:
    env = {**os.environ, "KEELSON_DATABASE_URL": url, **WORKER_SETTINGS,
           "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))}
    with log.open("ab") as out:
        return subprocess.Popen([sys.executable, "-m", "service.worker", "bench-worker"],
                                env=env, stdout=out, stderr=subprocess.STDOUT)


def _trainer(reads: Any, model_id: int) -> tuple[int, str | None]:
    from service.store.tables import TrainerRow

    with reads() as session:
        row = session.get(TrainerRow, model_id)
        return int(row.cursor), row.leased_by


def _queue_retrain(writes: Any, model_id: int) -> int:
    from service.store.tables import JobRow

    with transaction(writes) as session:
        job = JobRow(model_id=model_id, kind="retrain", status="queued",
                     params={"warm_start": False}, attempts=0)
        session.add(job)
        session.flush()
        return int(job.id)


def _job_epochs(reads: Any, job_id: int) -> int:
    from service.store.tables import JobRow, VersionRow

    with reads() as session:
        job = session.get(JobRow, job_id)
        version = session.get(VersionRow, job.version_id) if job.version_id else None
        return int(version.metrics["fit"]["epochs"]) if version else 0


def _job(reads: Any, job_id: int) -> tuple[str, float | None, str | None]:
    from service.store.tables import JobRow

    with reads() as session:
        job = session.get(JobRow, job_id)
        seconds = None
        if job.started_at is not None and job.finished_at is not None:
            seconds = (job.finished_at - job.started_at).total_seconds()
        return job.status, seconds, job.error


def _wait(check: Callable[[], Any], timeout: float) -> float:
    """Poll until ``check()`` is true; returns the perf_counter time it was."""
    deadline = time.perf_counter() + timeout
    while not check():
        if time.perf_counter() > deadline:
            raise TimeoutError(f"benchmark step did not finish within {timeout} s")
        time.sleep(0.05)
    return time.perf_counter()


def _cpu_seconds(pid: int) -> float:
    """User + system CPU seconds of a process so far (Linux /proc)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _peak_rss_mib(pid: int) -> float | None:
    """VmHWM of a process (Linux /proc), in MiB."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return round(int(line.split()[1]) / 1024, 1)
    except OSError:
        return None
    return None
