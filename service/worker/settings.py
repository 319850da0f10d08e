"""The worker's tunables, read through the one registry of settings.

Each field is a ``KEELSON_WORKER_*`` setting of service/config.py (its
default, parser and meaning are there, and in the README's table). A value is
taken from the configuration mapping the worker is given, else from the
environment, else the default.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from service.config import setting

_KEYS = {
    "lease_seconds": "KEELSON_WORKER_LEASE_SECONDS",
    "idle_seconds": "KEELSON_WORKER_IDLE_SECONDS",
    "poll_seconds": "KEELSON_WORKER_POLL_SECONDS",
    "claim_seconds": "KEELSON_WORKER_CLAIM_SECONDS",
    "chunk_records": "KEELSON_WORKER_CHUNK_RECORDS",
    "holdout_window": "KEELSON_WORKER_HOLDOUT_WINDOW",
    "max_models": "KEELSON_WORKER_MAX_MODELS",
    "release_seconds": "KEELSON_WORKER_RELEASE_SECONDS",
    "progress_seconds": "KEELSON_WORKER_PROGRESS_SECONDS",
    "retry_seconds": "KEELSON_WORKER_RETRY_SECONDS",
    "retry_max_seconds": "KEELSON_WORKER_RETRY_MAX_SECONDS",
    "case_retention_days": "KEELSON_CASE_RETENTION_DAYS",
    "delete_batch": "KEELSON_WORKER_DELETE_BATCH",
}


def _default(field: str) -> Any:
    return setting(_KEYS[field]).default


@dataclass(frozen=True)
class WorkerSettings:
    database_url: str
    # A lease outlives three missed heartbeats; a dead worker's models pass on
    # after at most this long.
    lease_seconds: float = _default("lease_seconds")
    # How long the stream must be quiet before a version is written for what
    # was applied since the last one (and before a warm-up starts short).
    idle_seconds: float = _default("idle_seconds")
    poll_seconds: float = _default("poll_seconds")
    # Each claim is a write transaction: not on every poll.
    claim_seconds: float = _default("claim_seconds")
    # One query per chunk, not per record.
    chunk_records: int = _default("chunk_records")
    # Promotion compares versions on at most this many of the latest holdout
    # records at or before the version's cursor (a bounded window).
    holdout_window: int = _default("holdout_window")
    max_models: int | None = _default("max_models")
    # A caught-up lineage is let go after this long: a worker's memory holds
    # the models with recent records, not every model it ever trained.
    release_seconds: float = _default("release_seconds")
    progress_seconds: float = _default("progress_seconds")
    # A model the worker cannot load or train is tried again after this many
    # seconds, doubled with each try that fails in a row, up to the maximum.
    retry_seconds: float = _default("retry_seconds")
    retry_max_seconds: float = _default("retry_max_seconds")
    # Scored cases without an outcome are deleted this many days after scoring.
    case_retention_days: float = _default("case_retention_days")
    # A delete job's transactions stay short: this many rows each (versions,
    # which hold snapshots, fewer: see service/worker/deletion.py).
    delete_batch: int = _default("delete_batch")

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
        for field, key in _KEYS.items():
            given = config.get(key)
            if given is None or given == "":
                given = env.get(key)
            values[field] = setting(key).value(given)
        return cls(**values)
