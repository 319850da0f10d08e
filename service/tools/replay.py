"""``keelson replay MODEL [--version N]``: audit a version by rebuilding it.

The work is service/worker/audit.py's (the worker's own stepping and
retraining, then a bit-for-bit comparison); this module reads the command
line, shows progress on stderr as ``keelson import`` and ``keelson export``
do (a bar on a terminal, the phase's label otherwise), prints the finding
and exits with its status.
"""

from __future__ import annotations

import sys
from typing import Any

import click

# Beyond the audit's own three outcomes (service/worker/audit.py).
CANNOT_REPLAY = 3


class _Bars:
    """One progress bar per phase of the rebuild (an online stretch of
    records, a retrain's epochs), on stderr."""

    def __init__(self, shown: bool) -> None:
        self.shown = shown
        self.label: str | None = None
        self.bar: Any = None
        self.done = 0

    def __call__(self, label: str, done: int, total: int) -> None:
        if label != self.label:
            self.close()
            self.label, self.done = label, 0
            self.bar = click.progressbar(length=max(total, 1), label=label, file=sys.stderr,
                                         hidden=not self.shown)
            self.bar.__enter__()
        self.bar.update(max(done - self.done, 0))
        self.done = done

    def close(self) -> None:
        if self.bar is not None:
            self.bar.__exit__(None, None, None)
            self.bar = None


@click.command("replay")
@click.argument("model")
@click.option("--version", "number", type=click.IntRange(min=1), default=None, metavar="N",
              help="The version to rebuild [default: the active version].")
@click.option("--quiet", is_flag=True, help="No progress on stderr.")
@click.option("--store", is_flag=True,
              help="If retention pruned the version's snapshot, rebuild it and store it "
                   "back (it then serves again) instead of exiting 3.")
def replay(model: str, number: int | None, quiet: bool, store: bool) -> None:
    """Rebuild a version of MODEL from the stored records and the model's
    history, with the worker's own code, and compare its weights and
    optimizer state (and every other part of the snapshot) bit for bit with
    the stored snapshot.

    An online version is rebuilt from its lineage's start: the train records
    in order up to its cursor, each settings change applied at its record
    position. A retrain version is rebuilt from its job's parameters and the
    records the job read.

    \b
    Exit status:
      0  identical
      1  differs: the first parameter that differs is printed, with both
         values and by how much
      2  records the version learned were forgotten (deleted): how many is
         printed, and nothing is compared
      3  cannot replay (no such model or version, a version restored from a
         file, a pruned snapshot without --store, the database unreachable)
    With --store, a pruned snapshot is rebuilt and stored back (exit 0).
    A mistyped command line exits 2, as for every command.
    """
    from threadpoolctl import threadpool_limits

    from service.config import load_config
    from service.errors import KeelsonError
    from service.store.database import make_engine, make_sessionmaker
    from service.store.record_log import decode_json
    from service.worker.audit import audit_version
    from service.worker.replay import CannotReplay
    from service.worker.settings import WorkerSettings

    config = load_config()
    settings = WorkerSettings.from_config(config)
    engine = make_engine(config["KEELSON_DATABASE_URL"], json_deserializer=decode_json)
    bars = _Bars(shown=not quiet)
    try:
        # One BLAS thread, as the worker runs (service/process.py): the same
        # sums in the same order, hence the same bits.
        with threadpool_limits(limits=1, user_api="blas"):
            writes = make_sessionmaker(engine, write=True) if store else None
            audit = audit_version(make_sessionmaker(engine), model, number,
                                  settings.chunk_records, bars, store_pruned=writes)
    except (KeelsonError, CannotReplay) as error:
        bars.close()
        click.echo(f"keelson replay: {getattr(error, 'detail', None) or error}", err=True)
        sys.exit(CANNOT_REPLAY)
    except Exception as error:  # noqa: BLE001 - a failure must not read as "differs" (1)
        bars.close()
        first = (str(error).strip().splitlines() or [""])[0]
        click.echo(f"keelson replay: cannot replay: {type(error).__name__}: {first}", err=True)
        sys.exit(CANNOT_REPLAY)
    finally:
        bars.close()
        engine.dispose()
    click.echo(audit.describe())
    sys.exit(audit.status)
