"""``keelson export MODEL FILE``: every stored record of a model into a file,
with a progress bar.

The records come through the use case the HTTP export uses
(service/usecases/record_export.py), read from the store a chunk at a time,
so the file is byte for byte what ``GET /v1/models/MODEL/records`` answers
and memory stays flat whatever the count. The file is written beside its
final name and renamed at the end: an interrupted export leaves no partial
file under that name.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import click

from service.store.record_dump import RecordFilter


@dataclass(frozen=True)
class ExportSummary:
    model: str
    path: Path
    records: int
    bytes: int

    def describe(self) -> str:
        return (f"{self.model} -> {self.path}: {self.records} records, "
                f"{self.bytes:,} bytes")


def format_of(path: Path, chosen: str | None) -> str:
    """``chosen``, else the file's extension (.ndjson, .jsonl: NDJSON), else CSV."""
    if chosen is not None:
        return chosen
    return "ndjson" if path.suffix.lower() in (".ndjson", ".jsonl") else "csv"


def export_records(config: dict[str, Any], model: str, path: Path, *, format: str,
                   split: str | None = None, show_progress: bool = True) -> ExportSummary:
    """Write ``model``'s records (of ``split``, if given) to ``path``."""
    from service.store.database import make_engine, make_sessionmaker
    from service.store.record_log import count_records
    from service.usecases.common import find_model
    from service.usecases.record_export import open_export

    engine = make_engine(config["KEELSON_DATABASE_URL"])
    partial = path.with_name(path.name + ".partial")
    try:
        sessions = make_sessionmaker(engine)
        with sessions() as session:
            total = count_records(session, find_model(session, model).id, split=split)
        written = 0
        with click.progressbar(length=max(total, 1), label=f"Exporting {model}",
                               file=sys.stderr, hidden=not show_progress) as bar:

            def heard(count: int) -> None:
                nonlocal written
                written += count
                bar.update(count)

            export = open_export(sessions, model, format, RecordFilter(split=split),
                                 on_chunk=heard)
            size = 0
            with partial.open("wb") as out:
                for data in export.chunks():
                    out.write(data)
                    size += len(data)
        partial.replace(path)
    finally:
        partial.unlink(missing_ok=True)
        engine.dispose()
    return ExportSummary(model, path, written, size)
