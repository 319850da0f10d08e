"""The training worker: leases models, applies their new records online,
writes versions, runs retrain jobs (see loop.py for the process as a whole).

``run_worker(config, stop=None, worker_id=None)`` is the entry point used by
``keelson worker`` and ``keelson serve``.
"""

from __future__ import annotations

import threading
from collections.abc import Mapping
from typing import Any


def run_worker(
    config: Mapping[str, Any],
    stop: threading.Event | None = None,
    worker_id: str | None = None,
) -> None:
    """Run a training worker until ``stop`` is set (or SIGTERM/SIGINT)."""
    from service.worker.loop import run_worker as run

    run(config, stop=stop, worker_id=worker_id)


__all__ = ["run_worker"]
