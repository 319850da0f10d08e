"""``python -m service.worker [worker-id]``: a worker configured from the
environment, as ``keelson worker --id`` is (used by tests that kill workers)."""

from __future__ import annotations

import sys

from service.process import stop_on_signals

if __name__ == "__main__":
    stop = stop_on_signals()  # before the heavy imports below: see service.process
    import logging

    from service.config import load_config
    from service.process import pin_blas_to_one_thread
    from service.worker import run_worker

    pin_blas_to_one_thread()
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(name)s %(message)s")
    run_worker(load_config(), stop=stop, worker_id=sys.argv[1] if len(sys.argv) > 1 else None)
