"""``keelson outcomes import MODEL FILE.csv``: stream outcomes into a model in batches.

Like ``keelson import`` (service/tools/importing.py: read once, row by row,
with a progress bar), each batch of rows goes through the very functions the
HTTP API uses for a ``text/csv`` body of ``POST .../outcomes``
(``parse_csv_outcomes``, then ``ingest_outcomes``): all or nothing per batch,
errors named by line of the file.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Any

import click

from service.tools.importing import (
    BULK_RECORDS,
    ImportSummary,
    batch_sender,
    refuse_bad_header,
    stream_csv_batches,
)


def import_outcomes_csv(config: dict[str, Any], model: str, path: Path, *,
                        batch_size: int = 1000, show_progress: bool = True) -> ImportSummary:
    """Send the outcomes of ``path`` (columns ``key``, ``label``) to ``model``
    batch by batch; returns what happened."""
    from service.store.database import make_engine, make_sessionmaker, refresh_planner_statistics
    from service.usecases.common import find_model
    from service.usecases.outcomes import CheckedOutcomes, ingest_outcomes
    from service.web.csv_outcomes import parse_csv_outcomes
    from service.web.schemas.rules import rules_for

    engine = make_engine(config["KEELSON_DATABASE_URL"])
    summary = ImportSummary(model=model, path=path)
    try:
        with make_sessionmaker(engine)() as session:
            found = find_model(session, model)
            spec, model_id = found.spec, found.id
        rules = rules_for(spec)
        writes = make_sessionmaker(engine, write=True)

        def parse(text: str, _spec: Any = None) -> list[dict[str, Any]]:
            return parse_csv_outcomes(text, rules, max_outcomes=batch_size)

        send = batch_sender(summary, lambda text: ingest_outcomes(
            writes, model, CheckedOutcomes(model_id, spec, parse(text))))

        stream_csv_batches(path, batch_size=batch_size, show_progress=show_progress,
                           summary=summary, what="outcomes",
                           check_header=lambda header: refuse_bad_header(
                               parse, header, spec, model),
                           send=send)
        if summary.accepted >= BULK_RECORDS:
            refresh_planner_statistics(engine, "records")
    finally:
        engine.dispose()
    return summary


@click.group()
def outcomes() -> None:
    """Outcomes of scored cases."""


@outcomes.command("import")
@click.argument("model")
@click.argument("csv_file", metavar="FILE.csv",
                type=click.Path(exists=True, dir_okay=False, path_type=Path))
@click.option("--batch-size", type=click.IntRange(1, 10_000), default=1000, show_default=True,
              help="Outcomes per batch; a batch with one bad row stores none of its rows.")
def outcomes_import(model: str, csv_file: Path, batch_size: int) -> None:
    """Send the outcomes in FILE.csv (columns key and label) to MODEL with a
    progress bar, through the same validation as the HTTP API. Exits with
    status 1 if any batch was rejected (unknown keys, conflicting labels)."""
    from service.config import load_config

    summary = import_outcomes_csv(load_config(), model, csv_file, batch_size=batch_size)
    click.echo(summary.describe())
    if summary.rejected_batches:
        sys.exit(1)
