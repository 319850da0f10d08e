"""`keelson bench ...`: the benchmark commands (figures for the README, not tests)."""

from __future__ import annotations

from pathlib import Path

import click

from service.tools.bench.track_record import bench_track_record
from service.tools.report import emit


@click.group()
def bench() -> None:
    """Measure throughput (not tests; figures for the README)."""


def _bench_postgres_url() -> str | None:
    from service.config import read_setting

    url: str | None = read_setting("KEELSON_BENCH_POSTGRES_URL")
    return url


@bench.command("engine")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
def bench_engine(as_json: bool) -> None:
    """Engine throughput beside the reference libraries (PyTorch, scikit-learn)."""
    from service.tools.bench.engine import run_engine_bench

    emit(run_engine_bench(), as_json)


@bench.command("http")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--duration", type=click.IntRange(1, 600), default=10, show_default=True,
              help="Seconds per measured route.")
@click.option("--connections", type=click.IntRange(1, 1024), default=16, show_default=True)
@click.option("--postgres-url", default=_bench_postgres_url,
              help="Also measure on this PostgreSQL server (a scratch database is made) "
                   "[env KEELSON_BENCH_POSTGRES_URL].")
def bench_http(as_json: bool, duration: int, connections: int, postgres_url: str | None) -> None:
    """Predictions and ingest over HTTP against a real gunicorn on loopback (needs wrk)."""
    from service.tools.bench.http import run_http_bench

    emit(run_http_bench(duration=duration, connections=connections,
                         postgres_url=postgres_url, progress=_progress), as_json)


@bench.command("budget")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--target-seconds", type=click.FloatRange(min=0.01), default=2.0,
              show_default=True, help="CPU time one prediction request may take.")
def bench_budget(as_json: bool, target_seconds: float) -> None:
    """CPU per budget unit of explanations here, and the budget that fits the target."""
    from service.tools.bench.budget import run_budget_bench

    emit(run_budget_bench(target_seconds=target_seconds, progress=_progress), as_json)


@bench.command("worker")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--records", type=click.IntRange(min=1000), default=100_000, show_default=True,
              help="Records stored before the worker starts.")
@click.option("--postgres-url", default=_bench_postgres_url,
              help="Also measure on this PostgreSQL server (a scratch database is made) "
                   "[env KEELSON_BENCH_POSTGRES_URL].")
@click.option("--database-url", default=None,
              help="Measure on this empty scratch database only (instead of SQLite + "
                   "PostgreSQL).")
def bench_worker(as_json: bool, records: int, postgres_url: str | None,
                 database_url: str | None) -> None:
    """Training worker throughput and memory against the engine alone."""
    from service.tools.bench.worker import run_worker_bench

    emit(run_worker_bench(database_url=database_url, records=records,
                           postgres_url=postgres_url, progress=_progress), as_json)


@bench.command("drift")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--requests", type=click.IntRange(min=60), default=2000, show_default=True,
              help="Predictions per setting (drift counted, and not).")
@click.option("--writers", type=click.IntRange(min=1), default=8, show_default=True,
              help="API processes whose hourly tally rows fill the table.")
@click.option("--days", type=click.IntRange(min=7), default=365, show_default=True,
              help="Days of tally rows stored.")
@click.option("--postgres-url", default=_bench_postgres_url,
              help="Also measure on this PostgreSQL server (a scratch database is made) "
                   "[env KEELSON_BENCH_POSTGRES_URL].")
def bench_drift(as_json: bool, requests: int, writers: int, days: int,
                postgres_url: str | None) -> None:
    """Predictions with drift counted against not, and the drift answer's time."""
    from service.tools.bench.drift import run_drift_bench

    emit(run_drift_bench(requests=requests, writers=writers, days=days,
                          postgres_url=postgres_url, progress=_progress), as_json)


def _progress(message: str) -> None:
    click.echo(message, err=True)


@bench.command("cases")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--duration", type=click.IntRange(1, 600), default=5, show_default=True,
              help="Seconds per measured round (two rounds each, alternating).")
@click.option("--connections", type=click.IntRange(1, 1024), default=8, show_default=True)
@click.option("--postgres-url", default=_bench_postgres_url,
              help="Also measure on this PostgreSQL server (a scratch database is made) "
                   "[env KEELSON_BENCH_POSTGRES_URL].")
def bench_cases(as_json: bool, duration: int, connections: int, postgres_url: str | None
                ) -> None:
    """Keyed against unkeyed explained predictions, and outcome ingest (needs wrk)."""
    from service.tools.bench.cases import run_cases_bench

    emit(run_cases_bench(duration=duration, connections=connections,
                         postgres_url=postgres_url, progress=_progress), as_json)



@bench.command("export")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--records", type=click.IntRange(min=1000), default=200_000, show_default=True,
              help="Records stored, then exported.")
@click.option("--postgres-url", default=_bench_postgres_url,
              help="Also measure on this PostgreSQL server (a scratch database is made) "
                   "[env KEELSON_BENCH_POSTGRES_URL].")
def bench_export(as_json: bool, records: int, postgres_url: str | None) -> None:
    """Taking the records out as CSV and NDJSON: records per second, memory."""
    from service.tools.bench.export import run_export_bench

    emit(run_export_bench(records=records, postgres_url=postgres_url, progress=_progress),
         as_json)


@bench.command("delete")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--records", type=click.IntRange(min=1000), default=1_000_000, show_default=True,
              help="Records of the model that is deleted.")
@click.option("--seconds", type=click.FloatRange(min=1.0), default=20.0, show_default=True,
              help="Seconds of baseline predictions.")
@click.option("--postgres-url", default=_bench_postgres_url,
              help="Also measure on this PostgreSQL server (a scratch database is made) "
                   "[env KEELSON_BENCH_POSTGRES_URL].")
def bench_delete(as_json: bool, records: int, seconds: float, postgres_url: str | None
                 ) -> None:
    """Other models' prediction latency while a model of many records is deleted."""
    from service.tools.bench.delete import run_delete_bench

    emit(run_delete_bench(records=records, seconds=seconds, postgres_url=postgres_url,
                          progress=_progress), as_json)


@bench.command("retrain")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--records", type=click.IntRange(min=1000), default=1_000_000, show_default=True,
              help="Records stored before the retrain job.")
@click.option("--fields", type=click.IntRange(min=1, max=100), default=20, show_default=True,
              help="Numeric fields per record.")
@click.option("--epochs", type=click.IntRange(min=1), default=None,
              help="Epochs the job runs, no early stop (default: the spec's early stopping).")
@click.option("--chunk-records", type=click.IntRange(min=1), default=None,
              help="Records per query while the job reads (default: the worker's setting).")
@click.option("--postgres-url", default=_bench_postgres_url,
              help="Also measure on this PostgreSQL server (a scratch database is made) "
                   "[env KEELSON_BENCH_POSTGRES_URL].")
@click.option("--no-sqlite", is_flag=True, help="PostgreSQL only.")
def bench_retrain(as_json: bool, records: int, fields: int, epochs: int,
                  chunk_records: int | None, postgres_url: str | None, no_sqlite: bool) -> None:
    """A retrain job over many records: rate against the engine in memory, peak memory."""
    from service.tools.bench.retrain import run_retrain_bench

    emit(run_retrain_bench(records=records, fields=fields, epochs=epochs,
                           chunk_records=chunk_records, postgres_url=postgres_url,
                           sqlite=not no_sqlite, progress=_progress), as_json)


@bench.command("page-load")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--runs", type=click.IntRange(1, 100), default=5, show_default=True,
              help="Cold loads of the model page, each in a fresh browser context.")
@click.option("--records", type=click.IntRange(min=1000), default=5000, show_default=True,
              help="Demo records loaded before the page is measured.")
@click.option("--screenshots", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Also save the overview, model and what-if pages as PNGs in this folder "
                   "(the README's: docs/screenshots).")
@click.option("--chromium", default="/usr/bin/chromium", show_default=True,
              help="The Chromium to drive (Debian's package).")
def bench_page_load(as_json: bool, runs: int, records: int, screenshots: Path | None,
                    chromium: str) -> None:
    """The model page in headless Chromium: load event time, JS and CSS bytes (needs
    the test extra's Playwright and Debian's chromium)."""
    from service.tools.bench.page_load import run_page_load_bench

    emit(run_page_load_bench(runs=runs, records=records, screenshots=screenshots,
                             chromium=chromium, progress=_progress), as_json)


@bench.command("page")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--records", type=click.IntRange(min=1000), default=1_000_000, show_default=True,
              help="Records stored.")
@click.option("--versions", type=click.IntRange(min=1), default=500, show_default=True,
              help="Versions stored.")
@click.option("--repeats", type=click.IntRange(min=5), default=50, show_default=True,
              help="Requests per page.")
@click.option("--postgres-url", default=_bench_postgres_url,
              help="Also measure on this PostgreSQL server (a scratch database is made) "
                   "[env KEELSON_BENCH_POSTGRES_URL].")
def bench_page(as_json: bool, records: int, versions: int, repeats: int,
               postgres_url: str | None) -> None:
    """Server time per page (overview, model, what-if) with a long history stored."""
    from service.tools.bench.page import run_page_bench

    emit(run_page_bench(records=records, versions=versions, repeats=repeats,
                        postgres_url=postgres_url, progress=_progress), as_json)


@bench.command("storage")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--records", type=click.IntRange(min=1000), default=50_000, show_default=True,
              help="Records measured (figures are scaled to 1,000,000 where that is linear).")
@click.option("--postgres-url", default=_bench_postgres_url,
              help="Also measure on this PostgreSQL server (a scratch database is made) "
                   "[env KEELSON_BENCH_POSTGRES_URL].")
def bench_storage(as_json: bool, records: int, postgres_url: str | None) -> None:
    """Bytes per 1,000,000 records: records, versions, snapshots before and after retention."""
    from service.tools.bench.storage import run_storage_bench

    emit(run_storage_bench(records=records, postgres_url=postgres_url, progress=_progress),
         as_json)


bench.add_command(bench_track_record)


@bench.command("replay")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--records", type=click.IntRange(min=1000), default=100_000, show_default=True,
              help="Records a worker learns, then replayed.")
@click.option("--postgres-url", default=_bench_postgres_url,
              help="Also measure on this PostgreSQL server (a scratch database is made) "
                   "[env KEELSON_BENCH_POSTGRES_URL].")
def bench_replay(as_json: bool, records: int, postgres_url: str | None) -> None:
    """`keelson replay`'s rebuild against the engine's online rate on the same records."""
    from service.tools.bench.replay import run_replay_bench

    emit(run_replay_bench(records=records, postgres_url=postgres_url, progress=_progress),
         as_json)


def _counts(text: str) -> tuple[int, ...]:
    try:
        counts = tuple(int(part) for part in text.split(",") if part.strip())
    except ValueError:
        raise click.BadParameter("give worker counts as whole numbers, e.g. 1,2,3") from None
    if not counts or min(counts) < 1:
        raise click.BadParameter("give at least one worker count, each at least 1")
    return counts


@bench.command("scale")
@click.option("--json", "as_json", is_flag=True, help="One JSON object.")
@click.option("--models", type=click.IntRange(min=1), default=500, show_default=True,
              help="Models of the fleet.")
@click.option("--min-records", type=click.IntRange(min=1), default=200, show_default=True,
              help="Fewest records a model holds.")
@click.option("--max-records", type=click.IntRange(min=1), default=2000, show_default=True,
              help="Most records a model holds.")
@click.option("--workers", default="1,2,3", show_default=True,
              help="Worker process counts measured, comma-separated.")
@click.option("--sections", default="fleet,predictions,retrain,storage", show_default=True,
              help="Sections measured, comma-separated (fleet, predictions, retrain, storage).")
@click.option("--duration", type=click.IntRange(1, 600), default=10, show_default=True,
              help="Seconds per measured prediction run (after a warm-up as long).")
@click.option("--connections", type=click.IntRange(1, 1024), default=16, show_default=True)
@click.option("--retrain-records", type=click.IntRange(min=1000), default=5_000_000,
              show_default=True, help="Records of the retrain section (20 numeric fields).")
@click.option("--storage-records", type=click.IntRange(min=1000), default=50_000,
              show_default=True, help="Records of the storage section (scaled to 1,000,000).")
@click.option("--postgres-url", default=_bench_postgres_url,
              help="Measure on this PostgreSQL server (a scratch database is made); "
                   "SQLite when none [env KEELSON_BENCH_POSTGRES_URL].")
def bench_scale(as_json: bool, models: int, min_records: int, max_records: int, workers: str,
                sections: str, duration: int, connections: int, retrain_records: int,
                storage_records: int, postgres_url: str | None) -> None:
    """Many models: online training by 1..n workers, and predictions across them."""
    from service.tools.bench.scale import SECTIONS, run_scale_bench

    if min_records > max_records:
        raise click.BadParameter("--min-records is above --max-records")
    chosen = tuple(part.strip() for part in sections.split(",") if part.strip())
    unknown = sorted(set(chosen) - set(SECTIONS))
    if unknown or not chosen:
        raise click.BadParameter(f"sections are {', '.join(SECTIONS)}; not {unknown}")
    emit(run_scale_bench(models=models, min_records=min_records, max_records=max_records,
                         workers=_counts(workers), postgres_url=postgres_url, sections=chosen,
                         duration=duration, connections=connections,
                         retrain_records=retrain_records, storage_records=storage_records,
                         progress=_progress),
         as_json)
