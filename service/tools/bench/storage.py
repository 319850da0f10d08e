"""``keelson bench storage``: bytes per 1,000,000 records for records,
versions and snapshots, before and after snapshot retention.

For each database: a scratch database is migrated, the invented pump-station
model gets ``--records`` records through the API and a worker trains it
online until every record is applied (``trained_demo``: a version every
``checkpoint_every`` records of the demo spec). Then, measured on disk
(PostgreSQL: ``pg_total_relation_size``, table + indexes + TOAST; SQLite: the
``dbstat`` table's pages per table and index):

* ``records``: the records table and its indexes;
* ``versions``: the versions table, split into its snapshots' bytes
  (``length(snapshot)``) and the rest (metrics, lineage, row overhead);
* ``after_retention``: snapshot retention run with the default settings as if
  every version were older than ``KEELSON_SNAPSHOT_RETENTION_DAYS``: what
  stays is every version ever active, the newest ``KEELSON_SNAPSHOT_KEEP_LAST``
  and the trainer's head.

Scaling to 1,000,000 records: records and versions grow linearly with the
records (a row per record; a version per ``checkpoint_every`` records, each
snapshot the same size for one spec), so those figures are the measured ones
times 1,000,000 / records. Snapshots kept after retention do not grow with
the records: the newest N are a constant, and versions ever active grow with
promotions, which follow the data, not the count. The figure per million
scales the promoted ones linearly (the worst case: promotions as frequent as
in the measured run) and adds the constant N once. Snapshots younger than the
retention age also stay: ``young_per_day`` says what a day of records at a
given rate keeps, so a reader can add their own rate.
"""

from __future__ import annotations

import datetime as dt
import os
import platform
import tempfile
from collections.abc import Callable
from typing import Any

from service.tools.bench.scratch import scratch_postgres
from service.tools.bench.trained import trained_demo

Progress = Callable[[str], None]
MILLION = 1_000_000
MB = 1_000_000


def run_storage_bench(records: int = 50_000, postgres_url: str | None = None,
                      progress: Progress = lambda _: None) -> dict[str, Any]:
    """Measure and return one JSON-ready object (see the module docstring)."""
    from service.config import setting
    from service.tools.demo import data as demo_data

    result: dict[str, Any] = {
        "benchmark": "storage",
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                    "platform": platform.platform(),
                    "load_average_1m_at_start": round(os.getloadavg()[0], 2)},
        "settings": {"records": records,
                     "checkpoint_every": demo_data.model_spec()["training"]["checkpoint_every"],
                     "snapshot_retention_days":
                         setting("KEELSON_SNAPSHOT_RETENTION_DAYS").default,
                     "snapshot_keep_last": setting("KEELSON_SNAPSHOT_KEEP_LAST").default},
        "targets": {"snapshots_after_retention_mb_per_million_records": 50.0},
    }
    with tempfile.TemporaryDirectory(prefix="keelson-bench-") as scratch:
        result["sqlite"] = _measure(f"sqlite:///{scratch}/bench.db", records, progress)
        if postgres_url:
            with scratch_postgres(postgres_url) as url:
                result["postgresql"] = _measure(url, records, progress)
    return result


def _measure(url: str, records: int, progress: Progress) -> dict[str, Any]:
    from sqlalchemy import func, select

    from service.config import setting
    from service.store.database import make_engine, make_sessionmaker
    from service.store.tables import VersionRow
    from service.web.extensions import close_drift_tally, get_database
    from service.worker.snapshot_retention import prune_snapshots

    trained = trained_demo(url, records, progress)
    close_drift_tally(trained.app)
    get_database(trained.app).engine.dispose()
    backend = trained.backend
    engine = make_engine(url)
    try:
        reads, writes = make_sessionmaker(engine), make_sessionmaker(engine, write=True)

        def snapshots() -> tuple[int, int, int]:
            with reads() as session:
                count, kept, size = session.execute(select(
                    func.count(), func.count(VersionRow.snapshot),
                    func.coalesce(func.sum(func.length(VersionRow.snapshot)), 0))).one()
            return int(count), int(kept), int(size)

        tables = _table_bytes(engine, ("records", "versions"))
        versions, _kept, snapshot_bytes = snapshots()
        with reads() as session:
            promoted = int(session.scalar(select(func.count()).select_from(VersionRow).where(
                VersionRow.promoted_at.is_not(None))) or 0)
        days = float(setting("KEELSON_SNAPSHOT_RETENTION_DAYS").default)
        keep_last = int(setting("KEELSON_SNAPSHOT_KEEP_LAST").default)
        progress(f"[{backend}] pruning snapshots as if {days:g} days had passed")
        later = dt.datetime.now(dt.UTC) + dt.timedelta(days=days + 1)
        while prune_snapshots(writes, reads, days, keep_last, now=later)[1]:
            pass
        _total, kept, kept_bytes = snapshots()
    finally:
        engine.dispose()
    scale = MILLION / records
    mean_snapshot = snapshot_bytes / versions if versions else 0.0
    # Kept per million: the constant newest N once, the ever-active ones
    # scaled with the records (see the module docstring).
    kept_per_million = (keep_last + 1 + promoted * scale) * mean_snapshot
    return {
        "records": records,
        "versions": versions,
        "versions_ever_active": promoted,
        "mean_snapshot_bytes": round(mean_snapshot),
        "measured_bytes": {**tables, "snapshots": snapshot_bytes,
                           "versions_without_snapshots": tables["versions"] - snapshot_bytes},
        "mb_per_million_records": {
            "records": round(tables["records"] * scale / MB, 1),
            "versions_rows_without_snapshots":
                round((tables["versions"] - snapshot_bytes) * scale / MB, 2),
            "snapshots_kept_forever": round(snapshot_bytes * scale / MB, 1),
            "snapshots_after_retention": round(kept_per_million / MB, 2),
        },
        "after_retention": {"versions_with_snapshot": kept, "snapshot_bytes": kept_bytes},
        "young": {
            "note": "snapshots younger than the retention age all stay: at 100,000 records a "
                    "day, this many MB (the retention age's records at the kept-forever rate)",
            "mb_at_100k_records_a_day": round(
                100_000 * days * snapshot_bytes / records / MB, 1)},
        "method": "measured at the given records; records, version rows and snapshots kept "
                  "forever scaled linearly; after retention: newest N (+ head) once, ever-active "
                  "scaled linearly (worst case)",
    }


def _table_bytes(engine: Any, tables: tuple[str, ...]) -> dict[str, int]:
    """On-disk bytes of each table with its indexes (and TOAST on PostgreSQL)."""
    from sqlalchemy import text

    sizes: dict[str, int] = {}
    with engine.connect() as connection:
        for table in tables:
            if engine.dialect.name == "postgresql":
                size = connection.scalar(text("SELECT pg_total_relation_size(:t)"), {"t": table})
            else:
                # dbstat: every page of the table and of the indexes on it.
                size = connection.scalar(text(
                    "SELECT sum(pgsize) FROM dbstat WHERE name = :t OR name IN "
                    "(SELECT name FROM sqlite_master WHERE type = 'index' AND tbl_name = :t)"),
                    {"t": table})
            sizes[table] = int(size or 0)
    return sizes
