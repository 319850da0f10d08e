"""The worker's tunables, read from the service configuration mapping.

Keys follow service/config.py's convention (the environment variable names).
A key missing from the mapping is read from the environment (service/config.py
does not list the worker's keys), then takes the default here.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class WorkerSettings:
    database_url: str
    # A lease outlives three missed heartbeats; a dead worker's models pass on
    # after at most this long.
    lease_seconds: float = 30.0
    # How long the stream must be quiet before a version is written for what
    # was applied since the last one (and before a warm-up starts short).
    idle_seconds: float = 3.0
    # Sleep between polls when there is nothing to do.
    poll_seconds: float = 0.25
    # How often to look for models free to lease (a write transaction each).
    claim_seconds: float = 1.0
    # Records read (and encoded) per query: one query per chunk, not per record.
    chunk_records: int = 1000
    # Promotion compares versions on at most this many of the latest holdout
    # records at or before the version's cursor (a bounded, documented window).
    holdout_window: int = 10_000
    # Models one worker leases at most (None: as many as are free).
    max_models: int | None = None
    # Seconds between progress writes of a running retrain job.
    progress_seconds: float = 1.0
    # A model the worker cannot load or train is tried again after this many
    # seconds, doubled with each try that fails in a row, up to the maximum.
    retry_seconds: float = 1.0
    retry_max_seconds: float = 300.0

    def __post_init__(self) -> None:
        if not 0 < self.retry_seconds <= self.retry_max_seconds:
            raise ValueError("the worker's retry wait must be positive and at most its maximum "
                             "(KEELSON_WORKER_RETRY_SECONDS, KEELSON_WORKER_RETRY_MAX_SECONDS)")

    @property
    def heartbeat_seconds(self) -> float:
        return self.lease_seconds / 3

    @classmethod
    def from_config(
        cls, config: Mapping[str, Any], environ: Mapping[str, str] | None = None
    ) -> WorkerSettings:
        url = config.get("KEELSON_DATABASE_URL") or config.get("DATABASE_URL")
        if not url:
            raise ValueError("the worker needs KEELSON_DATABASE_URL")
        values: dict[str, Any] = {"database_url": str(url)}
        env = os.environ if environ is None else environ
        for key, field in _KEYS.items():
            raw = config.get(key)
            if raw is None or raw == "":
                raw = env.get(key) or None
            if raw is not None:
                values[field] = _PARSE[field](raw)
        return cls(**values)


_KEYS = {
    "KEELSON_WORKER_LEASE_SECONDS": "lease_seconds",
    "KEELSON_WORKER_IDLE_SECONDS": "idle_seconds",
    "KEELSON_WORKER_POLL_SECONDS": "poll_seconds",
    "KEELSON_WORKER_CLAIM_SECONDS": "claim_seconds",
    "KEELSON_WORKER_CHUNK_RECORDS": "chunk_records",
    "KEELSON_WORKER_HOLDOUT_WINDOW": "holdout_window",
    "KEELSON_WORKER_MAX_MODELS": "max_models",
    "KEELSON_WORKER_PROGRESS_SECONDS": "progress_seconds",
    "KEELSON_WORKER_RETRY_SECONDS": "retry_seconds",
    "KEELSON_WORKER_RETRY_MAX_SECONDS": "retry_max_seconds",
}
_PARSE: dict[str, Any] = {
    "lease_seconds": float,
    "idle_seconds": float,
    "poll_seconds": float,
    "claim_seconds": float,
    "chunk_records": int,
    "holdout_window": int,
    "max_models": int,
    "progress_seconds": float,
    "retry_seconds": float,
    "retry_max_seconds": float,
}
