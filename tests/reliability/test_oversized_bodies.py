"""Oversized and chunked bodies against a real ``keelson serve``.

Held: a body over ``KEELSON_MAX_BODY_BYTES`` is a 413 problem and stores
nothing, however it is framed (Content-Length or chunked, RFC 9112 sections
6.2 and 7.1); a declared length over the limit is refused before the body is
sent, even when the client waits for ``100 Continue`` (RFC 9110 section
10.1.1); chunked bodies within the limit (extensions, trailers, odd chunk
sizes) are stored whole; a malformed chunk is a 400 problem. The first test is
the reproduction that lost 2,000 rows: a 12,000-row CSV sent chunked past
16 MiB was cut at 16 MiB and stored as the shorter file.
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import create_engine, func, select

from service.store.tables import RecordRow
from tests.reliability.harness import ADMIN, Client, api_server
from tests.reliability.probes import (
    RawHttp,
    aligned_csv,
    ask,
    assert_usual_answer,
    predicting_server,
    request_bytes,
)

pytestmark = pytest.mark.slow
MIB = 1024 * 1024
AUTH = {"Authorization": f"Bearer {ADMIN}"}
SMALL_LIMIT = 64 * 1024
RECORDS = "/v1/models/pump-risk/records"
PUMP_HEADER = "key,vibration_rms,pump_family,has_vfd,failed_within_30d\n"
BODY_ROUTES = ["/v1/models", RECORDS, "/v1/models/pump-risk/predictions",
               "/v1/models/pump-risk/retrain"]


def stored(database_url: str) -> int:
    engine = create_engine(database_url)
    try:
        with engine.connect() as connection:
            return int(connection.execute(select(func.count()).select_from(RecordRow))
                       .scalar_one())
    finally:
        engine.dispose()


def chunked(body: bytes, size: int = 65536, extension: str = "", trailer: str = "") -> bytes:
    out = bytearray()
    for start in range(0, len(body), size):
        piece = body[start:start + size]
        out += f"{len(piece):x}{extension}\r\n".encode() + piece + b"\r\n"
    return bytes(out) + b"0\r\n" + trailer.encode() + b"\r\n"


def post_chunked(base: str, path: str, body: bytes, content_type: str, **framing: str
                 ) -> tuple[RawHttp, bytes]:
    connection = RawHttp(base, timeout=60)
    head = request_bytes("POST", path, {**AUTH, "Content-Type": content_type,
                                        "Transfer-Encoding": "chunked"})
    connection.send(head + chunked(body, **framing))  # type: ignore[arg-type]
    return connection, head


def test_a_12000_row_chunked_csv_past_16_mib_is_413_and_stores_nothing(
        database_url: str, tmp_path: Path) -> None:
    fields = [f"f{i:02d}" for i in range(100)]
    spec = {"name": "wide", "task": "regression", "target": "y",
            "features": [{"name": f, "type": "numeric"} for f in fields]}
    rests = [",".join(f"{(i * 7 + k) % 97}.12345678901234" for k in range(100)) + f",{i % 13}"
             for i in range(12_000)]
    body, fitting = aligned_csv("key," + ",".join(fields) + ",y\n", rests, 16 * MIB)
    assert fitting <= 10_000  # cut at 16 MiB it is a valid CSV within the per-request cap
    with api_server(database_url, tmp_path, workers=1) as (base, _process):
        assert Client(base).request("POST", "/v1/models", spec)[0] == 201
        connection, _ = post_chunked(base, "/v1/models/wide/records", body, "text/csv")
        answer = connection.answer()
        connection.close()
    assert_usual_answer(answer, 413)
    assert "16777216 bytes" in answer.json()["detail"]
    assert stored(database_url) == 0


@pytest.fixture(scope="module")
def small_limit(sqlite_template: Path, tmp_path_factory: pytest.TempPathFactory
                ) -> Iterator[tuple[str, str]]:
    """A server whose body limit is 64 KiB, over the pump-risk model; (base, database)."""
    folder = tmp_path_factory.mktemp("bodies")
    shutil.copyfile(sqlite_template, folder / "keelson.db")
    url = f"sqlite:///{folder / 'keelson.db'}"
    with predicting_server(url, folder, KEELSON_MAX_BODY_BYTES=str(SMALL_LIMIT)) as base:
        yield base, url


def pump_csv(count: int, prefix: str) -> bytes:
    return (PUMP_HEADER + "".join(f"{prefix}{i},{i % 90}.5,screw,true,ok\n"
                                  for i in range(count))).encode()


@pytest.mark.parametrize("path", BODY_ROUTES)
def test_a_chunked_json_body_past_the_limit_is_413_on_every_route(
        small_limit: tuple[str, str], path: str) -> None:
    base, url = small_limit
    before = stored(url)
    rows = [{"key": f"j{i}", "features": {"vibration_rms": 1.5, "pump_family": "screw",
                                          "has_vfd": True}, "label": "ok"} for i in range(2000)]
    connection, _ = post_chunked(base, path, json.dumps({"records": rows}).encode(),
                                 "application/json")
    answer = connection.answer()
    assert connection.closed_by_server()
    connection.close()
    assert_usual_answer(answer, 413)
    assert stored(url) == before


def test_a_declared_length_past_the_limit_is_refused_before_the_body_is_sent(
        small_limit: tuple[str, str]) -> None:
    base, url = small_limit
    connection = RawHttp(base, timeout=30)
    connection.send(request_bytes("POST", RECORDS, {
        **AUTH, "Content-Type": "text/csv", "Content-Length": str(SMALL_LIMIT + 1),
        "Expect": "100-continue"}))
    answer = connection.answer()
    connection.close()
    assert_usual_answer(answer, 413)
    assert connection.interims == []  # no 100 Continue first: the server answers at once


def test_a_client_waiting_for_100_continue_gets_it_then_its_answer(
        small_limit: tuple[str, str]) -> None:
    base, url = small_limit
    body = pump_csv(50, "continued-")
    connection = RawHttp(base, timeout=30)
    connection.send(request_bytes("POST", RECORDS, {
        **AUTH, "Content-Type": "text/csv", "Content-Length": str(len(body)),
        "Expect": "100-continue"}))
    assert connection.interim() == 100  # RFC 9110 section 15.2.1
    connection.send(body)
    answer = connection.answer()
    connection.close()
    assert_usual_answer(answer, 201)
    assert answer.json() == {"accepted": 50, "duplicates": 0}


def test_chunked_bodies_within_the_limit_are_stored_whole(small_limit: tuple[str, str]
                                                          ) -> None:
    base, url = small_limit
    before = stored(url)
    for size, extension, trailer in [(1, "", ""), (7, ";name=value", ""),
                                     (4096, "", "X-Checksum: 1\r\n")]:
        body = pump_csv(300, f"chunks-of-{size}-")
        assert len(body) < SMALL_LIMIT
        connection, _ = post_chunked(base, RECORDS, body, "text/csv", size=size,
                                     extension=extension, trailer=trailer)
        answer = connection.answer()
        connection.close()
        assert_usual_answer(answer, 201)
        assert answer.json() == {"accepted": 300, "duplicates": 0}
    assert stored(url) == before + 900


@pytest.mark.parametrize("framing", [b"zz\r\nabc\r\n0\r\n\r\n", b"3\r\nabcXY0\r\n\r\n",
                                     b"3;a=\x01\r\nabc\r\n0\r\n\r\n"])
def test_a_malformed_chunk_is_a_400_problem(small_limit: tuple[str, str],
                                            framing: bytes) -> None:
    base, url = small_limit
    connection = RawHttp(base, timeout=30)
    connection.send(request_bytes("POST", RECORDS, {
        **AUTH, "Content-Type": "text/csv", "Transfer-Encoding": "chunked"}) + framing)
    answer = connection.answer()
    connection.close()
    assert_usual_answer(answer, 400)


def test_the_server_still_answers_after_the_refusals(small_limit: tuple[str, str]) -> None:
    assert ask(small_limit[0], "GET", "/healthz").status == 200
