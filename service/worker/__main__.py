"""``python -m service.worker [worker-id]``: a worker configured from the
environment, as ``keelson worker`` is (used by tests that kill workers)."""

from __future__ import annotations

import logging
import sys

from service.blas import pin_blas_to_one_thread
from service.config import load_config
from service.worker import run_worker

if __name__ == "__main__":
    pin_blas_to_one_thread()
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(message)s")
    run_worker(load_config(), worker_id=sys.argv[1] if len(sys.argv) > 1 else None)
