"""Records from CSV text (RFC 4180), checked by the model's rules.

The header names the columns: every feature, the target, and optionally
``key``; order is free. The columns a records export adds
(``record.sequence``, ``record.split``, ``record.time``) are allowed and
skipped, so an exported file reads back as it is. Each row becomes a record of the JSON shape
(``{"key"?, "features", "label"}``, cells as text), then the model's compiled
rules load it in their text form: a CSV cell obeys exactly the rules a JSON
value does, and an error names ``records.<row>.features.<column>`` (row 0 is
the first line after the header) or ``columns.<name>`` for the header.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Mapping
from typing import Any

from service.errors import InvalidInputError, MalformedError, TooLargeError
from service.usecases.record_export import EXPORT_ONLY_COLUMNS
from service.web.schemas.rules import NO_RECORDS, RecordRules, rules_for

KEY_COLUMN = "key"


def parse_csv_records(
    text: str, spec: Mapping[str, Any], *, rules: RecordRules | None = None,
    max_records: int | None = None,
) -> list[dict[str, Any]]:
    """``[{"key"?, "features": {...}, "label": ...}, ...]`` from CSV text, loaded
    by ``rules`` (default: the rules of ``spec``, which names the columns).

    Raises MalformedError (the text is not CSV), TooLargeError (more than
    ``max_records`` rows) or InvalidInputError (a header or cell breaks a rule).
    """
    # Spreadsheets often start UTF-8 files with a byte order mark; it is not
    # part of the first column's name (common practice, no source).
    text = text.removeprefix("\ufeff")
    # RFC 4180 quoting; strict makes a stray quote an error instead of data.
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    try:
        header = next(reader, None)
        if header is None or header == [] or header == [""]:
            raise MalformedError("The CSV is empty; the first line must name the columns.")
        features = [f["name"] for f in spec["features"]]
        _check_header(header, features, spec["target"])
        width = len(header)
        columns = {name: i for i, name in enumerate(header)}
        feature_columns = [(name, columns[name]) for name in features]
        label_column = columns[spec["target"]]
        key_column = columns.get(KEY_COLUMN)
        raw: list[dict[str, Any]] = []
        errors: dict[str, list[str]] = {}
        for row in reader:
            if not row:
                continue  # a blank line carries no record
            index = len(raw)
            if max_records is not None and index >= max_records:
                raise TooLargeError(f"At most {max_records} records per request.")
            if len(row) != width:
                errors[f"records.{index}"] = [
                    f"Line {reader.line_num}: expected {width} fields, found {len(row)}."
                ]
                raw.append({})
                continue
            record: dict[str, Any] = {
                "features": {name: row[i] for name, i in feature_columns},
                "label": row[label_column],
            }
            if key_column is not None and row[key_column] != "":
                record["key"] = row[key_column]
            raw.append(record)
    except csv.Error as exc:
        what = broken_reason(str(exc))
        raise MalformedError(
            f"The CSV is broken at line {reader.line_num}: {what}.",
            errors={f"records.{max(reader.line_num - 2, 0)}": [f"{what[0].upper()}{what[1:]}."]},
        ) from None
    if errors:
        raise InvalidInputError("Some CSV rows have the wrong number of fields.", errors=errors)
    if not raw:
        raise InvalidInputError("The CSV holds no records.", errors={"records": [NO_RECORDS]})
    return (rules or rules_for(spec)).load_records(raw, text=True)


def broken_reason(reason: str) -> str:
    """What the csv module found, in our words (its own text names its internals)."""
    if "expected after" in reason:
        return "a quoted field goes on after its closing quote (RFC 4180 section 2)"
    if "end of data" in reason:
        return "a quoted field is never closed (RFC 4180 section 2)"
    if "field limit" in reason:
        return f"a field is longer than {csv.field_size_limit()} characters"
    return "the line is not RFC 4180 CSV"


def _check_header(header: list[str], features: list[str], target: str) -> None:
    errors: dict[str, list[str]] = {}
    seen: set[str] = set()
    allowed = {*features, target, KEY_COLUMN, *EXPORT_ONLY_COLUMNS}
    for name in header:
        if name in seen:
            errors[f"columns.{name}"] = ["This column appears twice."]
        elif name not in allowed:
            errors[f"columns.{name}"] = ["Unknown column."]
        seen.add(name)
    for name in [*features, target]:
        if name not in seen:
            errors[f"columns.{name}"] = ["Missing column."]
    if errors:
        raise InvalidInputError("The CSV header does not match the model.", errors=errors)
