"""``keelson import MODEL FILE.csv``: stream a CSV file into a model in batches.

The file is read once, row by row (never whole into memory); every batch of
rows is written back out as CSV text and goes through the very functions the
HTTP API uses for a ``text/csv`` body (``parse_csv_records``, then
``ingest_records``). So a batch is all or nothing exactly as over HTTP: one
bad row rejects its whole batch and stores none of it, and the other batches
are unaffected. Errors are reported by line number in the file.
"""

from __future__ import annotations

import csv
import io
import re
import sys
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

import click

from service.errors import InvalidInputError, KeelsonError

# fullmatch: "$" lets a final "\n" by
_RECORD_PATH = re.compile(r"(?:records|outcomes)\.(\d+)(.*)", re.DOTALL)
MAX_ERRORS_SHOWN = 20
# After an import this large, PostgreSQL's planner statistics are refreshed at
# once rather than when autovacuum next gets to them: until then the worker's
# "records after the cursor" reads are planned for a near-empty table (a scan
# and sort of everything after the cursor: ~35 ms instead of <1 ms per chunk at
# 100k records, measured with `keelson bench worker`).
BULK_RECORDS = 10_000


@dataclass
class RejectedBatch:
    first_line: int
    last_line: int
    rows: int
    detail: str
    errors: dict[str, list[str]]


@dataclass
class ImportSummary:
    model: str
    path: Path
    rows: int = 0
    batches: int = 0
    accepted: int = 0
    duplicates: int = 0
    rejected: list[RejectedBatch] = field(default_factory=list)

    @property
    def rejected_batches(self) -> int:
        return len(self.rejected)

    @property
    def rejected_rows(self) -> int:
        return sum(batch.rows for batch in self.rejected)

    def describe(self) -> str:
        lines = [f"{self.path.name} -> {self.model}: {self.rows} rows in {self.batches} "
                 f"batches; {self.accepted} stored, {self.duplicates} duplicates, "
                 f"{self.rejected_rows} not stored ({self.rejected_batches} batches rejected)."]
        shown = 0
        for batch in self.rejected:
            lines.append(f"rejected lines {batch.first_line}-{batch.last_line} "
                         f"({batch.rows} rows, none stored): {batch.detail}")
            for where, messages in batch.errors.items():
                if shown == MAX_ERRORS_SHOWN:
                    lines.append("  ... (more errors not shown)")
                    return "\n".join(lines)
                lines.append(f"  {where}: {'; '.join(messages)}")
                shown += 1
        return "\n".join(lines)


class ImportAborted(click.ClickException):
    """The file cannot be read on (bad header, broken CSV); earlier batches stay stored."""


class _CountingLines:
    """The file's lines, counting the bytes handed out (for the progress bar)."""

    def __init__(self, stream: TextIO, on_bytes: Callable[[int], None]) -> None:
        self.stream = stream
        self.on_bytes = on_bytes

    def __iter__(self) -> Iterator[str]:
        for line in self.stream:
            self.on_bytes(len(line.encode("utf-8")))
            yield line


def as_csv(header: list[str], rows: list[list[str]]) -> str:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\r\n")  # RFC 4180 line ends
    writer.writerow(header)
    writer.writerows(rows)
    return out.getvalue()


def by_line(errors: dict[str, list[str]] | None, lines: list[int]) -> dict[str, list[str]]:
    """``records.3.features.x`` (or ``outcomes.3.label``) -> ``line 17:
    features.x`` (line numbers of the file)."""
    named: dict[str, list[str]] = {}
    for path, messages in (errors or {}).items():
        match = _RECORD_PATH.fullmatch(path)
        if match and int(match.group(1)) < len(lines):
            rest = match.group(2).lstrip(".")
            where = f"line {lines[int(match.group(1))]}" + (f" {rest}" if rest else "")
        else:
            where = path
        named.setdefault(where, []).extend(messages)
    return named


def import_csv(config: dict[str, Any], model: str, path: Path, *, batch_size: int = 1000,
               show_progress: bool = True) -> ImportSummary:
    """Ingest ``path`` into ``model`` batch by batch; returns what happened."""
    from service.store.database import make_engine, make_sessionmaker, refresh_planner_statistics
    from service.usecases.common import find_model
    from service.usecases.records import CheckedRecords, ingest_records
    from service.web.csv_records import parse_csv_records
    from service.web.schemas.rules import rules_for

    engine = make_engine(config["KEELSON_DATABASE_URL"])
    summary = ImportSummary(model=model, path=path)
    try:
        with make_sessionmaker(engine)() as session:
            found = find_model(session, model)
            spec, model_id = found.spec, found.id
        rules = rules_for(spec)
        writes = make_sessionmaker(engine, write=True)

        send = batch_sender(summary, lambda text: ingest_records(
            writes, model, CheckedRecords(model_id, spec,
                                          parse_csv_records(text, spec, rules=rules))))

        stream_csv_batches(path, batch_size=batch_size, show_progress=show_progress,
                           summary=summary, what="records",
                           check_header=lambda header: refuse_bad_header(
                               parse_csv_records, header, spec, model),
                           send=send)
        if summary.accepted >= BULK_RECORDS:
            refresh_planner_statistics(engine, "records")
    finally:
        engine.dispose()
    return summary


def batch_sender(summary: ImportSummary, store: Callable[[str], Any]
                 ) -> Callable[[list[str], list[list[str]], list[int]], None]:
    """What each batch of rows goes through: ``store`` (its CSV text to an
    ingest result), counted in ``summary``; a refused batch is kept there, by
    file line, and the import goes on."""

    def send(header: list[str], rows: list[list[str]], lines: list[int]) -> None:
        summary.batches += 1
        summary.rows += len(rows)
        try:
            result = store(as_csv(header, rows))
        except KeelsonError as error:
            summary.rejected.append(RejectedBatch(lines[0], lines[-1], len(rows),
                                                  error.detail, by_line(error.errors, lines)))
            return
        summary.accepted += result.accepted
        summary.duplicates += result.duplicates

    return send


def stream_csv_batches(path: Path, *, batch_size: int, show_progress: bool,
                       summary: ImportSummary, what: str,
                       check_header: Callable[[list[str]], None],
                       send: Callable[[list[str], list[list[str]], list[int]], None]) -> None:
    """Read ``path`` once, row by row, with a progress bar; check its header,
    then hand ``send`` each batch of rows (with their line numbers).
    ImportAborted when the file cannot be read on (earlier batches stay)."""
    # utf-8-sig: a byte-order mark some spreadsheets write is not part of the header.
    with path.open(encoding="utf-8-sig", newline="") as stream, click.progressbar(
        length=max(path.stat().st_size, 1), label=f"Importing {path.name}",
        file=sys.stderr, hidden=not show_progress,
    ) as bar:
        reader = csv.reader(_CountingLines(stream, bar.update), strict=True)
        try:
            header = next(reader, None)
            if not header:
                raise ImportAborted(f"{path} is empty; its first line must name the columns.")
            check_header(header)
            rows: list[list[str]] = []
            lines: list[int] = []
            for row in reader:
                if not row:
                    continue  # a blank line carries nothing
                rows.append(row)
                lines.append(reader.line_num)
                if len(rows) == batch_size:
                    send(header, rows, lines)
                    rows, lines = [], []
            if rows:
                send(header, rows, lines)
        except csv.Error as error:
            raise ImportAborted(
                f"{path}: broken CSV at line {reader.line_num} ({error}); stopped there. "
                f"{summary.accepted} {what} from earlier lines are stored.") from error
        except UnicodeDecodeError as error:
            raise ImportAborted(f"{path} is not UTF-8 text ({error}); "
                                f"{summary.accepted} {what} stored before it.") from error


def refuse_bad_header(parse: Callable[..., Any], header: list[str], spec: dict[str, Any],
                  model: str) -> None:
    """Refuse a header that does not match the model before sending anything."""
    try:
        parse(as_csv(header, []), spec)
    except InvalidInputError as error:
        problems = {k: v for k, v in (error.errors or {}).items() if k.startswith("columns.")}
        if problems:
            listed = "; ".join(f"{k.split('.', 1)[1]}: {', '.join(v)}"
                               for k, v in problems.items())
            raise ImportAborted(f"the header does not match model {model!r}: "
                                f"{listed}") from error
