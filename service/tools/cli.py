"""The ``keelson`` command: run, operate, demonstrate and measure the service.

Each command reads its settings the way the service does (``KEELSON_*``
environment variables, see service.config) and imports what it needs only
when it runs, so ``--help`` is instant and one missing piece never breaks the
others. Failures end with a one-line message on stderr and a non-zero status.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

import click

from service.tools.bench.commands import bench
from service.tools.forget_command import forget
from service.tools.model_commands import model
from service.tools.outcome_import import outcomes
from service.tools.replay import replay

SCOPES = ("ingest", "predict", "admin")


class KeelsonGroup(click.Group):
    """A command group that turns expected failures into one clear line."""

    def invoke(self, ctx: click.Context) -> Any:
        try:
            return super().invoke(ctx)
        except (click.exceptions.Exit, click.exceptions.Abort, click.ClickException):
            raise
        except Exception as error:  # noqa: BLE001 - translated, never swallowed
            message = _explain_failure(error)
            if message is None:
                raise
            raise click.ClickException(message) from error


def _explain_failure(error: Exception) -> str | None:
    from sqlalchemy.exc import OperationalError, ProgrammingError

    from service.config import ConfigError
    from service.errors import KeelsonError

    if isinstance(error, ConfigError):
        return f"configuration: {error}"
    if isinstance(error, KeelsonError):
        details = [f"  {path}: {'; '.join(messages)}"
                   for path, messages in (error.errors or {}).items()]
        return "\n".join([error.detail, *details])
    if isinstance(error, OperationalError | ProgrammingError):
        reason = str(error.orig).strip().splitlines()[0] if error.orig else str(error)
        hint = ""
        if "no such table" in reason or ("relation" in reason and "does not exist" in reason):
            hint = "; is the schema there? run `keelson db upgrade`"
        return f"cannot use the database ({_database_url_for_humans()}): {reason}{hint}"
    return None


def _config(**overrides: Any) -> dict[str, Any]:
    from service.config import load_config

    return load_config(overrides or None)


def _database_url_for_humans() -> str:
    from sqlalchemy.engine import make_url

    try:
        return make_url(_config()["KEELSON_DATABASE_URL"]).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - only used inside an error message
        return "KEELSON_DATABASE_URL"


@click.group(cls=KeelsonGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="keelson", prog_name="keelson")
def cli() -> None:
    """Keelson keeps small neural networks learning from labelled records sent
    over HTTP and explains every prediction.

    Settings come from the environment: KEELSON_DATABASE_URL (default
    sqlite:///keelson.db in the current folder) and KEELSON_ADMIN_TOKEN.
    """


# ------------------------------------------------------------------ serving

# Any fixed number: the PostgreSQL advisory lock every upgrading process takes.
_UPGRADE_LOCK = 0x6B65656C  # "keel"


def upgrade_schema(url: str, revision: str = "head") -> None:
    """Apply migrations; on PostgreSQL one process at a time (several API hosts
    started together all run `keelson serve`, which upgrades first), so the
    others wait and then find nothing left to do."""
    from sqlalchemy import text

    from service.store.database import is_sqlite, make_engine
    from service.store.schema import upgrade_database

    if is_sqlite(url):  # the upgrade's own write lock already serialises it
        upgrade_database(url, revision)
        return
    engine = make_engine(url)
    try:
        with engine.connect() as connection:
            connection.execute(text("SELECT pg_advisory_lock(:key)"), {"key": _UPGRADE_LOCK})
            try:
                upgrade_database(url, revision)
            finally:
                connection.execute(text("SELECT pg_advisory_unlock(:key)"),
                                   {"key": _UPGRADE_LOCK})
    finally:
        engine.dispose()



@cli.command()
@click.option("--host", default=None, help="Address to listen on [env KEELSON_HOST; 127.0.0.1].")
@click.option("--port", type=click.IntRange(1, 65535), default=None,
              help="Port to listen on [env KEELSON_PORT; 8000].")
@click.option("--workers", type=click.IntRange(min=1), default=None,
              help="API worker processes [env KEELSON_WEB_WORKERS; 2 x CPUs + 1, at most 8].")
@click.option("--no-worker", is_flag=True,
              help="Do not start a training worker beside the API (run `keelson worker` "
                   "elsewhere).")
def serve(host: str | None, port: int | None, workers: int | None, no_worker: bool) -> None:
    """Upgrade the schema, then run the API under gunicorn and one training worker.

    SIGINT or SIGTERM stops both cleanly: the API finishes its requests and the
    worker writes a version of what it applied since the last one.
    """
    from service.tools.serve import run_server

    config = _config()
    upgrade_schema(config["KEELSON_DATABASE_URL"])
    if not config["KEELSON_ADMIN_TOKEN"]:
        click.echo("keelson: KEELSON_ADMIN_TOKEN is not set; clients need a token from "
                   "`keelson token create --name NAME --scope admin|ingest|predict`.",
                   err=True)
    status = run_server(host=host, port=port, web_workers=workers, with_worker=not no_worker)
    sys.exit(status)


@cli.command()
@click.option("--id", "worker_id", default=None,
              help="A name for this worker in leases and logs [default: host and pid].")
def worker(worker_id: str | None) -> None:
    """Run a training worker alone: apply new records, write versions, run retrains.

    SIGINT or SIGTERM: finish the current step, write a version if records were
    applied since the last one, exit.
    """
    from service.process import pin_blas_to_one_thread, stop_on_signals

    # Already installed by the entry point (service.process.main) before any
    # heavy import; again here for callers that invoke the command directly.
    stop = stop_on_signals()
    from service.web.observability import configure_logging
    from service.worker import run_worker

    configure_logging()
    pin_blas_to_one_thread()
    run_worker(_config(), stop=stop, worker_id=worker_id)


# ---------------------------------------------------------------- database


@cli.group()
def db() -> None:
    """Database schema commands."""


@db.command("upgrade")
@click.option("--revision", default="head", show_default=True, help="Migration to stop at.")
def db_upgrade(revision: str) -> None:
    """Apply migrations to KEELSON_DATABASE_URL (creates a SQLite file if needed)."""
    upgrade_schema(_config()["KEELSON_DATABASE_URL"], revision)
    click.echo(f"database {_database_url_for_humans()} is at migration {revision}")


# ------------------------------------------------------------------ tokens


@cli.group()
def token() -> None:
    """Bearer tokens: create (printed once), list, revoke."""


def _database() -> Any:
    from service.store.database import open_database

    return open_database(_config()["KEELSON_DATABASE_URL"])


@token.command("create")
@click.option("--name", required=True, help="Who or what will use the token.")
@click.option("--scope", "scopes", multiple=True, required=True,
              type=click.Choice(SCOPES), help="A scope to grant; repeat for several.")
@click.option("--model", "models", multiple=True, metavar="NAME",
              help="Limit the token to this model (repeat for several); without it "
                   "the token reaches every model.")
def token_create(name: str, scopes: tuple[str, ...], models: tuple[str, ...]) -> None:
    """Create a token and print it once (only its hash is stored)."""
    from service.usecases.tokens import create_token

    row, plaintext = create_token(_database(), name, scopes, models or None)
    click.echo(plaintext)
    click.echo(f"token {row.id} ({name}; scopes: {', '.join(row.scopes)}; "
               f"models: {_models_text(row.models)}): store it now, "
               "it cannot be shown again", err=True)


def _models_text(models: list[str] | None) -> str:
    return "all" if models is None else ",".join(models)


@token.command("list")
@click.option("--json", "as_json", is_flag=True, help="One JSON object instead of a table.")
def token_list(as_json: bool) -> None:
    """List tokens (never the secrets)."""
    from service.usecases.tokens import list_tokens

    rows = list_tokens(_database())
    items: list[dict[str, Any]] = [
        {"id": r.id, "name": r.name, "scopes": list(r.scopes),
         "models": None if r.models is None else list(r.models),
         "created_at": r.created_at.isoformat() if r.created_at else None,
         "revoked_at": r.revoked_at.isoformat() if r.revoked_at else None}
        for r in rows
    ]
    if as_json:
        click.echo(json.dumps({"tokens": items}, indent=2))
        return
    if not items:
        click.echo("no tokens")
    for item in items:
        state = f"revoked {item['revoked_at']}" if item["revoked_at"] else "active"
        click.echo(f"{item['id']:>4}  {item['name']:<24} {','.join(item['scopes']):<22} "
                   f"{state:<12} models: {_models_text(item['models'])}")


@token.command("revoke")
@click.argument("id_or_name")
def token_revoke(id_or_name: str) -> None:
    """Revoke the token with this id, or every live token with this name
    (see `keelson token list`). Takes effect within a second or so."""
    from service.usecases.tokens import revoke_token

    rows = revoke_token(_database(), id_or_name)
    for row in rows:
        click.echo(f"token {row.id} ({row.name}) revoked")


# -------------------------------------------------------------- demo, import


@cli.command()
@click.option("--records", type=click.IntRange(min=200), default=5000, show_default=True,
              help="Weekly pump summaries to generate and send.")
@click.option("--seed", type=int, default=7, show_default=True, help="Seed of the generator.")
@click.option("--retrain/--no-retrain", default=True, show_default=True,
              help="After online training, also run a full retrain job.")
@click.option("--cases", type=click.IntRange(min=0), default=1000, show_default=True,
              help="Second act: pump-weeks scored with case keys whose outcomes arrive "
                   "later (0: no second act).")
@click.option("--serve", "then_serve", is_flag=True,
              help="Afterwards keep serving the API (and a worker) on the same database.")
@click.option("--host", default=None, help="With --serve: address [127.0.0.1].")
@click.option("--port", type=click.IntRange(1, 65535), default=None,
              help="With --serve: port [8000].")
@click.option("--workers", type=click.IntRange(min=1), default=None,
              help="With --serve: API worker processes.")
def demo(records: int, seed: int, retrain: bool, cases: int, then_serve: bool,
         host: str | None, port: int | None, workers: int | None) -> None:
    """Load the invented pump-station scenario and show explained predictions.

    Creates the model `pump-risk` through the HTTP API, streams generated weekly
    pump summaries to it, trains until a version is active, and prints a few
    predictions with an explanation bar per field. A second act scores later
    weeks with case keys, sends their outcomes, and shows the track record,
    its calibration and alarm, and the drift of each field after an invented
    heat wave. The data is invented. Runs again on the same database without
    storing anything twice.
    """
    from service.tools.demo.run import run_demo

    run_demo(_config(), records=records, seed=seed, serve=then_serve, host=host, port=port,
             web_workers=workers, retrain=retrain, cases=cases)


@cli.command("import")
@click.argument("model")
@click.argument("csv_file", metavar="FILE.csv",
                type=click.Path(exists=True, dir_okay=False, path_type=Path))
@click.option("--batch-size", type=click.IntRange(1, 10_000), default=1000, show_default=True,
              help="Records per batch; a batch with one bad row stores none of its rows.")
def import_(model: str, csv_file: Path, batch_size: int) -> None:
    """Bulk-ingest FILE.csv into MODEL with a progress bar.

    FILE.csv (RFC 4180): a header row of feature names, the target column and
    optionally `key`. Batches go through the same validation and ingest as the
    HTTP API. Exits with status 1 if any batch was rejected.
    """
    from service.tools.importing import import_csv

    summary = import_csv(_config(), model, csv_file, batch_size=batch_size)
    click.echo(summary.describe())
    if summary.rejected_batches:
        sys.exit(1)


@cli.command("export")
@click.argument("model")
@click.argument("output", metavar="FILE", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--format", "format_", type=click.Choice(["csv", "ndjson"]), default=None,
              help="File format [default: from FILE's extension, .ndjson or .jsonl for "
                   "NDJSON, else CSV].")
@click.option("--split", type=click.Choice(["train", "holdout"]), default=None,
              help="Only this split's records [default: both].")
def export_command(model: str, output: Path, format_: str | None, split: str | None) -> None:
    """Write every stored record of MODEL to FILE with a progress bar: the
    very file `GET /v1/models/MODEL/records` answers. A CSV export reads back
    with `keelson import`."""
    from service.tools.exporting import export_records, format_of

    summary = export_records(_config(), model, output, format=format_of(output, format_),
                             split=split)
    click.echo(summary.describe())


@cli.command("export-version")
@click.argument("model")
@click.argument("number", metavar="N", type=click.IntRange(min=1))
@click.argument("output", metavar="FILE", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--format", "format_", type=click.Choice(["onnx", "snapshot"]), default=None,
              help="onnx or snapshot [default: snapshot for a FILE ending in .keelson, "
                   "else onnx].")
def export_version_command(model: str, number: int, output: Path, format_: str | None) -> None:
    """Write version N of MODEL to FILE, as the HTTP export
    (`GET /v1/models/MODEL/versions/N/export`) does: an ONNX model taking the
    raw fields and answering the probabilities or the value, or Keelson's own
    snapshot file for `keelson restore`."""
    from service.usecases.exports import export_version
    from service.versions.cache import VersionCache

    chosen = format_ or ("snapshot" if output.suffix == ".keelson" else "onnx")
    database = _database()
    try:
        exported = export_version(VersionCache(database.read, max_age=0.0), database.read,
                                  model, number, chosen)
    finally:
        database.engine.dispose()
    output.write_bytes(exported.data)
    click.echo(f"version {number} of {model} written to {output} ({len(exported.data):,} bytes)")


@cli.command("restore")
@click.argument("snapshot", metavar="FILE",
                type=click.Path(exists=True, dir_okay=False, path_type=Path))
@click.option("--as", "name", required=True, metavar="NAME",
              help="The new model's name (it must not exist yet).")
def restore(snapshot: Path, name: str) -> None:
    """Load a snapshot file (`keelson export-version MODEL N FILE.keelson`, or
    the HTTP export with format=snapshot) into this installation's database
    as a new model NAME, with that version active."""
    from service.tools.restoring import restore_file

    click.echo(restore_file(_config(), snapshot, name))


cli.add_command(outcomes)  # keelson outcomes import (service/tools/outcome_import.py)
cli.add_command(model)  # keelson model history|pause|resume|set|delete (model_commands.py)
cli.add_command(forget)  # keelson forget (service/tools/forget_command.py)
cli.add_command(replay)  # keelson replay MODEL (service/tools/replay.py)


# ------------------------------------------------------------- benchmarks

cli.add_command(bench)  # service/tools/bench/commands.py


def main() -> None:
    cli(prog_name="keelson")


if __name__ == "__main__":
    main()
