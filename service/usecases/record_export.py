"""Use case: every stored record of a model, out as CSV or NDJSON, streamed.

The model is found (or NotFoundError raised) and the last sequence number
fixed before the first byte, so an answer either is refused whole or runs to
a defined end: records stored while it streams are not in it (a later
``after`` fetches them). Then the records come a chunk per short read
(service/store/record_dump.py) and each chunk is encoded to bytes at once:
memory stays that of one chunk whatever the count.

CSV columns: ``key``, ``record.sequence``, ``record.split``, ``record.time``,
then every feature in the spec's order and the target. The three ``record.``
names cannot clash with a field (a field name has no dot), and the CSV
reader of ``POST .../records`` and ``keelson import`` skips them, so the file
reads back as it is. Cells are spelled as the CSV reader reads them: numbers
in Python's shortest round-trip form, booleans ``true``/``false``.
"""

from __future__ import annotations

import csv
import io
import json
import operator
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass
from typing import Any

import orjson
from sqlalchemy.orm import Session, sessionmaker

from service.store.record_dump import RecordFilter, StoredRecords, iter_stored
from service.store.record_log import last_seq
from service.usecases.common import find_model

CSV_MEDIA_TYPE = "text/csv"
NDJSON_MEDIA_TYPE = "application/x-ndjson"
MEDIA_TYPES = {"csv": CSV_MEDIA_TYPE, "ndjson": NDJSON_MEDIA_TYPE}
RECORD_FORMATS = tuple(MEDIA_TYPES)
# The columns a CSV export adds to a record's own (key, fields, target); the
# CSV reader skips them (service/web/csv_records.py).
EXPORT_ONLY_COLUMNS = ("record.sequence", "record.split", "record.time")
# Records per read: large enough that a query's round trip is noise, small
# enough that a chunk's rows and its encoded text stay a few megabytes.
CHUNK_RECORDS = 5000


@dataclass(frozen=True)
class RecordExport:
    """An export ready to stream: ``chunks()`` yields its bytes."""

    model: str
    format: str
    total_hint: int  # the last sequence number it reads up to
    chunks: Callable[[], Iterator[bytes]]

    @property
    def media_type(self) -> str:
        return MEDIA_TYPES[self.format]

    @property
    def filename(self) -> str:
        return f"{self.model}-records.{self.format}"


def open_export(sessions: sessionmaker[Session], name: str, format: str,
                which: RecordFilter, limit: int | None = None,
                chunk_records: int = CHUNK_RECORDS,
                on_chunk: Callable[[int], None] | None = None) -> RecordExport:
    """The records of model ``name`` matching ``which`` (at most ``limit``) in
    ``format`` (one of RECORD_FORMATS, checked by the caller); NotFoundError
    for an unknown model. ``on_chunk`` hears each chunk's record count."""
    with sessions() as session:
        model = find_model(session, name)
        model_id, spec = model.id, model.spec
        upto = last_seq(session, model_id)
    bounded = RecordFilter(which.after, upto if which.upto is None else min(upto, which.upto),
                           which.split, which.since, which.until)
    encode = csv_encoder(spec) if format == "csv" else ndjson_chunk

    def chunks() -> Iterator[bytes]:
        if format == "csv":
            yield csv_header(spec)
        for chunk in iter_stored(sessions, model_id, bounded, chunk_records, limit):
            data = encode(chunk)
            if on_chunk is not None:
                on_chunk(len(chunk))
            yield data

    return RecordExport(name, format, upto, chunks)


def ndjson_chunk(chunk: StoredRecords) -> bytes:
    """One JSON object per line."""
    return b"".join(
        _json({"key": key, "sequence": seq, "split": split, "time": time,
               "fields": features, "label": label}) + b"\n"
        for seq, key, split, time, features, label in zip(
            chunk.seqs, chunk.keys, chunk.splits, chunk.times, chunk.features, chunk.labels,
            strict=True))


def csv_header(spec: Mapping[str, Any]) -> bytes:
    return _csv_text([["key", *EXPORT_ONLY_COLUMNS,
                       *(f["name"] for f in spec["features"]), spec["target"]]])


def csv_encoder(spec: Mapping[str, Any]) -> Callable[[StoredRecords], bytes]:
    """A chunk -> CSV rows (RFC 4180, CRLF line ends) for this spec's fields.

    A row is written as orjson writes it as a JSON array, brackets dropped:
    when no value in it needed a JSON escape (no backslash in the text),
    that is RFC 4180 exactly (strings in double quotes, commas inside quotes
    allowed; numbers in shortest round-trip form; ``true``/``false``), at a
    fraction of the csv module's cost. A row with an escape (a quote, a
    backslash, a control character in a key or level) goes through the csv
    module instead. A record without key gets an empty cell, read back as
    no key."""
    names = [f["name"] for f in spec["features"]]
    values = operator.itemgetter(*names) if len(names) > 1 else (
        lambda features: (features[names[0]],))

    def encode(chunk: StoredRecords) -> bytes:
        lines = []
        for seq, key, split, time, features, label in zip(
                chunk.seqs, chunk.keys, chunk.splits, chunk.times, chunk.features,
                chunk.labels, strict=True):
            row = [key or "", seq, split, time, *values(features), label]
            text = _json(row)
            lines.append(text[1:-1] if b"\\" not in text else
                         _csv_text([map(_cell, row)]).rstrip(b"\r\n"))
        lines.append(b"")
        return b"\r\n".join(lines)

    return encode


def _json(value: Any) -> bytes:
    """Compact JSON: orjson's, or the standard library's for what orjson
    refuses (an integer beyond 64 bits); the same values either way."""
    try:
        return orjson.dumps(value)
    except orjson.JSONEncodeError:
        return json.dumps(value, ensure_ascii=False, separators=(",", ":")).encode("utf-8")


def _cell(value: Any) -> Any:
    """A value as the CSV reader reads it back: the csv module spells a float
    as ``repr`` does (shortest round trip); a boolean must be
    ``true``/``false`` (a boolean class is named so)."""
    if value is True:
        return "true"
    if value is False:
        return "false"
    return value


def _csv_text(rows: Any) -> bytes:
    out = io.StringIO()
    csv.writer(out, lineterminator="\r\n").writerows(rows)
    return out.getvalue().encode("utf-8")
