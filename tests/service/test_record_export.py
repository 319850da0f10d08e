"""GET /v1/models/{name}/records (issue 12, section 5): every stored record out,
streamed as NDJSON or CSV, paged by sequence, filtered by split and time.
Our own contract (docs/http-api.md); CSV per RFC 4180, NDJSON one JSON
object (RFC 8259) a line, media type choice per RFC 9110 section 12.5.1."""

from __future__ import annotations

import csv
import datetime as dt
import io
import json
from typing import Any
from urllib.parse import quote

from sqlalchemy import select

from service.store.record_dump import RecordFilter
from service.store.tables import ModelRow, RecordRow
from service.usecases.record_export import open_export
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, create_model, ingest_raw, record

URL = "/v1/models/pump-risk/records"


def _stored(api: ApiClient) -> list[dict[str, Any]]:
    """The records as the database holds them, in sequence order."""
    with get_database(api.app).read() as session:
        rows = session.execute(select(RecordRow).join(ModelRow).where(
            ModelRow.name == "pump-risk").order_by(RecordRow.seq)).scalars().all()
        return [{"key": r.key, "sequence": r.seq, "split": r.split, "fields": r.features,
                 "label": r.label} for r in rows]


def _fill(api: ApiClient, count: int = 40) -> list[dict[str, Any]]:
    create_model(api)
    sent = [record(i, key=f"pump-{i}" if i % 5 else None, vibration_rms=i * 1.234567891)
            for i in range(count)]
    ingest_raw(get_database(api.app).write, "pump-risk", sent[:count // 2])
    ingest_raw(get_database(api.app).write, "pump-risk", sent[count // 2:])
    return sent


def _ndjson(api: ApiClient, query: str = "", **headers: str) -> list[dict[str, Any]]:
    response = api.client.get(f"{URL}{query}", headers={
        "Authorization": "Bearer test-admin-token", **headers})
    assert response.status_code == 200, response.get_data(True)
    assert response.mimetype == "application/x-ndjson"
    assert response.is_streamed
    return [json.loads(line) for line in response.get_data(True).splitlines()]


def test_ndjson_holds_every_record_as_stored_in_sequence_order(any_api: ApiClient) -> None:
    sent = _fill(any_api)
    lines = _ndjson(any_api)
    assert [{k: v for k, v in line.items() if k != "time"} for line in lines] == \
        _stored(any_api)
    assert [(line["key"], line["fields"], line["label"]) for line in lines] == \
        [(r.get("key"), r["features"], r["label"]) for r in sent]
    for line in lines:
        assert dt.datetime.fromisoformat(line["time"]).utcoffset() == dt.timedelta(0)


def test_csv_by_accept_or_format_reads_as_the_same_records(any_api: ApiClient) -> None:
    _fill(any_api)
    lines = _ndjson(any_api)
    for query, headers in (("", {"Accept": "text/csv"}), ("?format=csv", {})):
        response = any_api.client.get(f"{URL}{query}", headers={
            "Authorization": "Bearer test-admin-token", **headers})
        assert response.status_code == 200
        assert response.mimetype == "text/csv"
        assert 'filename="pump-risk-records.csv"' in response.headers["Content-Disposition"]
        rows = list(csv.DictReader(io.StringIO(response.get_data(True), newline="")))
        assert list(rows[0]) == ["key", "record.sequence", "record.split", "record.time",
                                 "vibration_rms", "pump_family", "has_vfd",
                                 "failed_within_30d"]
        assert [(r["key"] or None, int(r["record.sequence"]), r["record.split"],
                 dt.datetime.fromisoformat(r["record.time"]), float(r["vibration_rms"]),
                 r["pump_family"], r["has_vfd"] == "true", r["failed_within_30d"])
                for r in rows] == \
            [(line["key"], line["sequence"], line["split"],
              dt.datetime.fromisoformat(line["time"]), *line["fields"].values(),
              line["label"]) for line in lines]


def test_pages_by_sequence_and_filters_by_split_and_time(any_api: ApiClient) -> None:
    _fill(any_api)
    whole = _ndjson(any_api)
    pages, after = [], 0
    while True:
        page = _ndjson(any_api, f"?after={after}&limit=7")
        if not page:
            break
        assert len(page) <= 7
        pages.extend(page)
        after = page[-1]["sequence"]
    assert pages == whole
    for split in ("train", "holdout"):
        assert _ndjson(any_api, f"?split={split}") == [r for r in whole if r["split"] == split]
    cut = whole[-1]["time"]  # the second batch's time
    since = [r for r in whole if r["time"] >= cut]
    assert 0 < len(since) < len(whole)
    assert _ndjson(any_api, f"?since={quote(cut)}") == since
    assert _ndjson(any_api, f"?until={quote(cut)}") == [r for r in whole if r["time"] < cut]


def test_the_stream_is_read_a_chunk_at_a_time(any_api: ApiClient) -> None:
    _fill(any_api, count=30)
    export = open_export(get_database(any_api.app).read, "pump-risk", "ndjson",
                         RecordFilter(), chunk_records=7)
    pieces = list(export.chunks())
    assert [piece.count(b"\n") for piece in pieces] == [7, 7, 7, 7, 2]


def test_refusals_change_nothing_and_are_problems(any_api: ApiClient) -> None:
    _fill(any_api, count=8)
    before = _stored(any_api)
    predict = any_api.token("predict", "ingest")
    any_api.request("GET", URL, 403, token=predict)
    any_api.request("GET", URL, 401, token=None)
    any_api.request("GET", "/v1/models/lift-risk/records", 404)
    any_api.request("GET", f"{URL}?format=xml", 422)
    any_api.request("GET", f"{URL}?split=all", 422)
    any_api.request("GET", f"{URL}?after=-1", 422)
    any_api.request("GET", f"{URL}?limit=0", 422)
    any_api.request("GET", f"{URL}?since=yesterday", 422)
    any_api.request("GET", f"{URL}?cursor=3", 422)
    any_api.request("GET", URL, 406, headers={"Accept": "application/xml"})
    assert _stored(any_api) == before


def test_the_accept_header_chooses_by_preference(any_api: ApiClient) -> None:
    # RFC 9110 section 12.5.1: the highest q wins; */* takes either (NDJSON here).
    _fill(any_api, count=4)
    for accept, expected in (("*/*", "application/x-ndjson"),
                             ("text/csv;q=0.9, application/x-ndjson;q=0.5", "text/csv"),
                             ("application/json, text/*", "text/csv"),
                             ("application/x-ndjson", "application/x-ndjson")):
        response = any_api.client.get(URL, headers={
            "Authorization": "Bearer test-admin-token", "Accept": accept})
        assert (response.status_code, response.mimetype) == (200, expected), accept


def test_times_read_as_python_writes_them_whatever_the_database(any_api: ApiClient) -> None:
    # The time of a record is RFC 3339 in UTC, spelt as datetime.isoformat()
    # spells it (no fraction when the microseconds are 0), on both databases
    # (the service writes every time in UTC).
    _fill(any_api, count=4)
    moments = [dt.datetime(2026, 3, 1, 6, 30, 0, tzinfo=dt.UTC),
               dt.datetime(2026, 3, 1, 6, 30, 0, 120, tzinfo=dt.UTC),
               dt.datetime(2026, 3, 1, 5, 30, 5, 999999, tzinfo=dt.UTC),
               dt.datetime(2026, 3, 1, 23, 59, 59, 500000, tzinfo=dt.UTC)]
    with get_database(any_api.app).write() as session:
        seqs = list(session.scalars(select(RecordRow.seq).order_by(RecordRow.seq)))
        for seq, moment in zip(seqs, moments, strict=True):
            session.execute(RecordRow.__table__.update().where(RecordRow.seq == seq)
                            .values(received_at=moment))
        session.commit()
    assert [line["time"] for line in _ndjson(any_api)] == [
        moment.astimezone(dt.UTC).isoformat() for moment in moments]
