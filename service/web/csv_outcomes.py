"""Outcomes from CSV text (RFC 4180): columns ``key`` and ``label``, in any order.

Each row becomes ``{"key", "label"}`` (cells as text) and the model's rules load
the batch in their text form, so a CSV label obeys exactly the rules a JSON one
does; an error names ``outcomes.<row>.<column>`` (row 0 is the first line after
the header) or ``columns.<name>`` for the header.
"""

from __future__ import annotations

import csv
import io
from typing import Any

from service.errors import InvalidInputError, MalformedError, TooLargeError
from service.web.csv_records import broken_reason
from service.web.schemas.rules import NO_OUTCOMES, RecordRules

COLUMNS = ("key", "label")


def parse_csv_outcomes(text: str, rules: RecordRules, *, max_outcomes: int
                       ) -> list[dict[str, Any]]:
    """``[{"key", "label"}, ...]`` from CSV text, loaded by ``rules``.

    Raises MalformedError (not CSV), TooLargeError (more than ``max_outcomes``
    rows) or InvalidInputError (a header or cell breaks a rule).
    """
    text = text.removeprefix("\ufeff")  # a spreadsheet's byte order mark (as for records)
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    raw: list[dict[str, Any]] = []
    errors: dict[str, list[str]] = {}
    try:
        header = next(reader, None)
        if header is None or header == [] or header == [""]:
            raise MalformedError("The CSV is empty; the first line must name the columns.")
        _check_header(header)
        key_at, label_at = header.index("key"), header.index("label")
        for row in reader:
            if not row:
                continue  # a blank line carries no outcome
            if len(raw) >= max_outcomes:
                raise TooLargeError(f"At most {max_outcomes} outcomes per request.")
            if len(row) != len(header):
                errors[f"outcomes.{len(raw)}"] = [
                    f"Line {reader.line_num}: expected {len(header)} fields, found {len(row)}."]
                raw.append({})
                continue
            raw.append({"key": row[key_at], "label": row[label_at]})
    except csv.Error as exc:
        what = broken_reason(str(exc))
        raise MalformedError(f"The CSV is broken at line {reader.line_num}: {what}.") from None
    if errors:
        raise InvalidInputError("Some CSV rows have the wrong number of fields.", errors=errors)
    if not raw:
        raise InvalidInputError("The CSV holds no outcomes.", errors={"outcomes": [NO_OUTCOMES]})
    return rules.load_outcomes({"outcomes": raw}, max_outcomes=max_outcomes, text=True)


def _check_header(header: list[str]) -> None:
    errors: dict[str, list[str]] = {}
    for name in header:
        if name not in COLUMNS:
            errors[f"columns.{name}"] = ["Unknown column; an outcome has key and label."]
        elif header.count(name) > 1:
            errors[f"columns.{name}"] = ["This column appears twice."]
    for name in COLUMNS:
        if name not in header:
            errors[f"columns.{name}"] = ["Missing column."]
    if errors:
        raise InvalidInputError("The CSV header does not match an outcome.", errors=errors)
