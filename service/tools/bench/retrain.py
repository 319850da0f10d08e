"""``keelson bench retrain``: a retrain over millions of records, against the engine.

For each database (a scratch SQLite file; PostgreSQL when a server URL is
given) ``records`` records of ``fields`` numeric fields are stored in bulk
(SQLite: one ``executemany`` per 50,000 rows; PostgreSQL: ``COPY``), split
train/holdout as ingest does. A retrain job is queued and run by the worker's
own job runner in a child process (retrain_child.py), and measured:

* ``worker``: train records x epochs per second of the whole job (reading and
  decoding every record once, the epochs, holdout scoring, the version), its
  load and fit parts, and the child's peak resident set (its own ``VmHWM``;
  ``ru_maxrss`` from ``wait4`` only bounds it: Linux carries the resident set
  of the process that spawned the child, which holds the records here, over
  ``exec`` into the child's figure);
* ``engine_in_memory``: ``Learner.fit`` on the same train rows already encoded
  in memory, for as many epochs, with the same seed: its rate, the ratio, and
  whether its weights equal the job's version bit for bit (they must: the epoch
  order depends on the seed and the row positions only, engine/rows.py);
* ``decode``: records per second of reading and decoding stored records
  (``iter_chunks``) and of encoding them, on a sample of the train records.

The network is ``fields``-32-16-1 (binary, tanh, SGD, batch 64), run for exactly
``epochs`` epochs (patience = epochs), or with the spec's early stopping (at
most 200 epochs, patience 10) when ``epochs`` is None; the in-memory fit runs
as many (the same seed and rows stop at the same epoch). The labels are invented: a noisy linear
rule, there only so the network has something to learn.
"""

from __future__ import annotations

import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from service.store.database import transaction
from service.tools.bench.scratch import on_each_database

Progress = Callable[[str], None]
STORE_BATCH = 50_000
DECODE_SAMPLE = 200_000
HOLDOUT_FRACTION = 0.01
ROOT = Path(__file__).resolve().parents[2]


def spec_for(fields: int, epochs: int | None) -> dict[str, Any]:
    """The model: ``epochs`` exactly (patience as long), or the spec's early
    stopping when None."""
    training: dict[str, Any] = {"optimizer": "sgd", "learning_rate": 0.01, "momentum": 0.9,
                                "holdout_fraction": HOLDOUT_FRACTION, "seed": 0,
                                "batch_size": 64}
    if epochs is not None:
        training.update(max_epochs=epochs, patience=epochs)
    return {
        "name": "bench-retrain", "task": "binary", "target": "label",
        "features": [{"name": f"f{i:02d}", "type": "numeric"} for i in range(fields)],
        "hidden_layers": [32, 16], "activation": "tanh", "promotion": "auto",
        "training": training,
    }


def run_retrain_bench(records: int, fields: int = 20, epochs: int | None = None,
                      chunk_records: int | None = None, postgres_url: str | None = None,
                      sqlite: bool = True, progress: Progress = lambda _: None) -> dict[str, Any]:
    """Measure and return one JSON-ready object (see the module docstring)."""
    result: dict[str, Any] = {
        "benchmark": "retrain",
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                    "numpy": np.__version__, "platform": platform.platform(),
                    "load_average_1min_start": round(os.getloadavg()[0], 2)},
        "settings": {"records": records, "fields": fields, "epochs": epochs,
                     "network": f"{fields}-32-16-1", "holdout_fraction": HOLDOUT_FRACTION,
                     "chunk_records": chunk_records, "target_ratio": 0.7,
                     "target_peak_rss_mib": 512},
    }
    result.update(on_each_database(
        lambda url: _measure(url, records, fields, epochs, chunk_records, progress),
        postgres_url, sqlite=sqlite))
    result["machine"]["load_average_1min_end"] = round(os.getloadavg()[0], 2)
    return result


def _measure(url: str, records: int, fields: int, epochs: int | None, chunk_records: int | None,
             progress: Progress) -> dict[str, Any]:
    from service.store.database import open_database
    from service.store.record_log import decode_json
    from service.store.schema import upgrade_database

    backend = url.split(":", 1)[0].split("+", 1)[0]
    upgrade_database(url)
    database = open_database(url, json_deserializer=decode_json)
    progress(f"[{backend}] storing {records} records")
    started = time.perf_counter()
    model_id, raw, labels, is_train = _store(database, records, fields, epochs)
    stored = time.perf_counter() - started
    job_id = _queue_retrain(database.write, model_id)

    progress(f"[{backend}] retrain job in a worker process")
    child = _run_child(url, chunk_records)
    version = _version(database.read, job_id)
    n_train = int(is_train.sum())
    if version["snapshot"] is None:
        raise RuntimeError(f"the retrain job did not succeed: {version['error']}")
    epochs = int(version["epochs"])

    progress(f"[{backend}] decoding and the engine in memory")
    decode = _decode_rates(database.read, model_id, version, chunk_records)
    fit_seconds, same = _engine_in_memory(version, raw[is_train], labels[is_train])
    database.engine.dispose()
    worker_rate = n_train * epochs / child["job_seconds"] if child["job_seconds"] else None
    engine_rate = n_train * epochs / fit_seconds
    return {
        "store_seconds": round(stored, 1), "train_records": n_train,
        "job": {"status": version["status"], "error": version["error"], "epochs": epochs},
        "worker": {
            "job_seconds": round(child["job_seconds"], 2),
            "load_seconds": child["load_seconds"], "fit_seconds": child["fit_seconds"],
            "load_records_per_s": round(n_train / child["load_seconds"])
            if child["load_seconds"] else None,
            "train_records_epochs_per_s": None if worker_rate is None else round(worker_rate),
            "peak_rss_mib": child["peak_rss_mib"],
            "ru_maxrss_upper_bound_mib": child["ru_maxrss_upper_bound_mib"],
        },
        "engine_in_memory": {
            "fit_seconds": round(fit_seconds, 2),
            "train_records_epochs_per_s": round(engine_rate),
            "same_weights_as_the_job": same,
        },
        "ratio": None if worker_rate is None else round(worker_rate / engine_rate, 3),
        "fit_only_ratio": round(fit_seconds / child["fit_seconds"], 3)
        if child["fit_seconds"] else None,
        "decode": decode,
    }


def _store(database: Any, records: int, fields: int, epochs: int | None
           ) -> tuple[int, np.ndarray, np.ndarray, np.ndarray]:
    """The model and its records, stored in bulk; returns the raw features,
    labels and train mask too (for the engine's side)."""
    import engine
    from service.store.tables import ModelRow, TrainerRow, utcnow
    from service.usecases.records import split_of

    spec = engine.apply_defaults(spec_for(fields, epochs))
    with transaction(database.write) as session:
        model = ModelRow(name="bench-retrain", spec=spec, records_train=0, records_holdout=0)
        session.add(model)
        session.flush()
        session.add(TrainerRow(model_id=model.id, cursor=0))
        model_id = int(model.id)
    names = [f"f{i:02d}" for i in range(fields)]
    rng = np.random.default_rng(2026)
    direction = rng.normal(size=fields)
    raw = np.empty((records, fields))
    labels = np.empty(records, dtype=bool)
    is_train = np.empty(records, dtype=bool)
    postgres = database.engine.dialect.name == "postgresql"
    received = utcnow()
    connection = database.engine.raw_connection()
    try:
        for start in range(0, records, STORE_BATCH):
            stop = min(start + STORE_BATCH, records)
            X = rng.normal(size=(stop - start, fields))
            raw[start:stop] = X
            labels[start:stop] = (X @ direction + rng.normal(size=stop - start)) > 0
            rows = []
            for offset, row in enumerate(X.tolist()):
                seq = start + offset + 1
                split = split_of(model_id, None, seq, HOLDOUT_FRACTION)
                is_train[seq - 1] = split == "train"
                text = "{" + ",".join(f'"{n}":{v!r}' for n, v in zip(names, row,
                                                                     strict=True)) + "}"
                rows.append((seq, model_id, text, "true" if labels[seq - 1] else "false",
                             split))
            _insert(connection, rows, received, postgres)
        connection.commit()
    finally:
        connection.close()
    with transaction(database.write) as session:
        model_row = session.get(ModelRow, model_id)
        assert model_row is not None
        model_row.records_train = int(is_train.sum())
        model_row.records_holdout = records - model_row.records_train
        from sqlalchemy import text as sql

        if postgres:
            session.execute(sql("SELECT setval(pg_get_serial_sequence('records', 'seq'), "
                                ":top)"), {"top": records})
            session.execute(sql("ANALYZE records"))
        else:
            session.execute(sql("ANALYZE"))
    return model_id, raw, labels, is_train


def _insert(connection: Any, rows: list[tuple[Any, ...]], received: Any, postgres: bool
            ) -> None:
    if postgres:
        at = received.isoformat()
        data = "".join(f"{s}\t{m}\t\\N\t{f}\t{lab}\t{sp}\t{at}\n" for s, m, f, lab, sp in rows)
        with connection.cursor() as cursor, cursor.copy(
                "COPY records (seq, model_id, key, features, label, split, received_at) "
                "FROM STDIN") as copy:
            copy.write(data)
        return
    at = received.strftime("%Y-%m-%d %H:%M:%S.%f")
    cursor = connection.cursor()
    cursor.executemany("INSERT INTO records (seq, model_id, key, features, label, split, "
                       "received_at) VALUES (?, ?, NULL, ?, ?, ?, ?)",
                       [(*row, at) for row in rows])
    cursor.close()


def _queue_retrain(writes: Any, model_id: int) -> int:
    from service.store.tables import JobRow

    with transaction(writes) as session:
        job = JobRow(model_id=model_id, kind="retrain", status="queued",
                     params={"warm_start": False}, attempts=0)
        session.add(job)
        session.flush()
        return int(job.id)


def _run_child(url: str, chunk_records: int | None) -> dict[str, Any]:
    env = {**os.environ, "KEELSON_DATABASE_URL": url,
           "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))}
    if chunk_records:
        env["KEELSON_WORKER_CHUNK_RECORDS"] = str(chunk_records)
    log = Path(tempfile.gettempdir()) / f"keelson-bench-retrain-{os.getpid()}.log"
    with log.open("ab") as err:
        child = subprocess.Popen([sys.executable, "-m", "service.tools.bench.retrain_child"],
                                 env=env, stdout=subprocess.PIPE, stderr=err)
        assert child.stdout is not None
        out = child.stdout.read()
        _, status, usage = os.wait4(child.pid, 0)
        child.returncode = os.waitstatus_to_exitcode(status)
    if child.returncode:
        raise RuntimeError(f"the retrain child failed ({child.returncode}); see {log}")
    figures: dict[str, Any] = json.loads(out)
    # VmHWM, the child's own peak; ru_maxrss from wait4 also counts this
    # process's resident set at the spawn (Linux keeps it over exec): an upper bound.
    figures["peak_rss_mib"] = figures.pop("vm_hwm_mib")
    figures["ru_maxrss_upper_bound_mib"] = round(usage.ru_maxrss / 1024, 1)  # Linux: KiB
    return figures


def _version(reads: Any, job_id: int) -> dict[str, Any]:
    from service.store.tables import JobRow, VersionRow

    with reads() as session:
        job = session.get(JobRow, job_id)
        assert job is not None
        version = session.get(VersionRow, job.version_id) if job.version_id else None
        return {"status": job.status, "error": job.error,
                "snapshot": None if version is None else version.snapshot,
                "epochs": None if version is None else version.metrics["fit"]["epochs"]}


def _decode_rates(reads: Any, model_id: int, version: dict[str, Any],
                  chunk_records: int | None) -> dict[str, Any]:
    from engine import Learner
    from service.store.record_log import iter_chunks
    from service.worker.settings import WorkerSettings

    learner = Learner.from_bytes(version["snapshot"])
    chunk = chunk_records or WorkerSettings("sqlite://").chunk_records
    read = encode = 0.0
    count = 0
    started = time.perf_counter()
    for part in iter_chunks(reads, model_id, 2**62, chunk, split="train"):
        read += time.perf_counter() - started
        at = time.perf_counter()
        learner.encode(part.features)
        encode += time.perf_counter() - at
        count += len(part)
        if count >= DECODE_SAMPLE:
            break
        started = time.perf_counter()
    return {"sample_records": count, "chunk_records": chunk,
            "read_decode_records_per_s": round(count / read),
            "encode_records_per_s": round(count / encode)}


def _engine_in_memory(version: dict[str, Any], raw: np.ndarray, labels: np.ndarray
                      ) -> tuple[float, bool | None]:
    """Seconds of Learner.fit on the train rows in memory (BLAS on one thread, as
    in the worker), and whether the weights equal the job's version."""
    from threadpoolctl import threadpool_limits

    from engine import Learner

    job = Learner.from_bytes(version["snapshot"])
    learner = Learner.from_bytes(version["snapshot"])
    names = learner.fields
    X = np.empty_like(raw)
    for start in range(0, len(raw), STORE_BATCH):
        part = raw[start : start + STORE_BATCH].tolist()
        X[start : start + len(part)] = learner.encode([dict(zip(names, row, strict=True))
                                                        for row in part])
    del raw
    Y = learner.encode_labels(labels.tolist())
    with threadpool_limits(limits=1, user_api="blas"):
        started = time.perf_counter()
        learner.fit(X, Y)
        seconds = time.perf_counter() - started
    return seconds, bool(np.array_equal(learner.network.params, job.network.params))
