"""``python -m service.tools.bench.retrain_child``: one queued retrain job run by
the worker's own job runner (service/worker/job_runner.py), as ``keelson
worker`` runs it, in a process of its own so its peak memory is the job's.

Configured from the environment like a worker (``KEELSON_DATABASE_URL`` and the
``KEELSON_WORKER_*`` settings). Prints one JSON object: the job's load and fit
seconds (from the job's own log line) and this process's peak RSS (VmHWM).
"""

from __future__ import annotations

import json
import logging
import resource
import sys
import threading
import time
from typing import Any

from service.process import pin_blas_to_one_thread

LOADED = "job %s: %s train records loaded in %.2f s, fitted in %.2f s (%s epochs)"


class _JobLines(logging.Handler):
    """Keeps the arguments of the job's "loaded ... fitted" line."""

    def __init__(self) -> None:
        super().__init__()
        self.loaded: tuple[Any, ...] | None = None

    def emit(self, record: logging.LogRecord) -> None:
        if record.msg == LOADED and isinstance(record.args, tuple):
            self.loaded = record.args


def main() -> None:
    pin_blas_to_one_thread()
    from service.config import load_config
    from service.store.database import open_database
    from service.store.record_log import decode_json
    from service.worker.job_runner import JobRunner
    from service.worker.settings import WorkerSettings

    lines = _JobLines()
    logger = logging.getLogger("keelson.worker")
    logger.setLevel(logging.INFO)
    logger.addHandler(lines)
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(message)s",
                        stream=sys.stderr)
    settings = WorkerSettings.from_config(load_config())
    database = open_database(settings.database_url, json_deserializer=decode_json)
    runner = JobRunner(settings, database.read, database.write, "bench-retrain",
                       threading.Event())
    started = time.perf_counter()
    runner.poll()
    runner.close()
    seconds = time.perf_counter() - started
    database.engine.dispose()
    load_s = fit_s = None
    if lines.loaded is not None:
        load_s, fit_s = float(lines.loaded[2]), float(lines.loaded[3])
    json.dump({"job_seconds": seconds, "load_seconds": load_s, "fit_seconds": fit_s,
               "vm_hwm_mib": _vm_hwm_mib(),
               "ru_maxrss_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024},
              sys.stdout)


def _vm_hwm_mib() -> float | None:
    """This process's own peak resident set (Linux /proc VmHWM, in MiB). Not
    ru_maxrss: Linux carries the spawning process's resident set over exec into
    it (the bench's parent holds the records in memory), so ru_maxrss can only
    be an upper bound here."""
    try:
        with open("/proc/self/status") as status:
            for line in status:
                if line.startswith("VmHWM:"):
                    return round(int(line.split()[1]) / 1024, 1)
    except OSError:
        return None
    return None


if __name__ == "__main__":
    main()
