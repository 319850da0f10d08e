"""Requests the server answers itself, before the app: every one is RFC 9457
problem details with the security headers and an ``X-Request-Id``, like the
app's own answers, its detail a fixed sentence that echoes nothing sent (the
request line may carry a token) and names no internals; nothing sent reaches
the server's log either.

gunicorn answered these with a ``text/html`` page quoting the request and
without the headers. Statuses are RFC 9110/9112's: 400 for what is not
HTTP/1.1, 414 for an over-long request line, 431 for over-large heads, 417
for an unknown expectation, 501 for an unknown transfer coding.
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.reliability.probes import RawHttp, ask, assert_usual_answer, predicting_server

pytestmark = pytest.mark.slow
LEAK = "leaked-secret-q7"
H = b"Host: keelson.test\r\n"

CASES: list[tuple[str, bytes, int]] = [
    ("not a request line", b"GARBAGE " + LEAK.encode() + b"\r\n\r\n", 400),
    ("lower-case method", b"get /healthz?token=" + LEAK.encode() + b" HTTP/1.1\r\n" + H + b"\r\n",
     400),
    ("unknown version", b"GET /healthz?access_token=" + LEAK.encode() + b" HTTP/7.1\r\n" + H
     + b"\r\n", 400),
    ("control character in the target", b"GET /he\x01althz HTTP/1.1\r\n" + H + b"\r\n", 400),
    ("bare LF line ends", b"GET /healthz HTTP/1.1\nHost: x\n\n", 400),
    ("request line over 4094 bytes", b"GET /" + b"a" * 5000 + b" HTTP/1.1\r\n" + H + b"\r\n",
     414),
    ("one header over 8190 bytes", b"GET /healthz HTTP/1.1\r\n" + H + b"X-Big: "
     + b"a" * 9000 + b"\r\n\r\n", 431),
    ("more than 100 headers", b"GET /healthz HTTP/1.1\r\n" + H
     + b"".join(b"X-H%d: v\r\n" % i for i in range(150)) + b"\r\n", 431),
    ("head over 32 KiB", b"GET /healthz HTTP/1.1\r\n" + H
     + b"".join(b"X-H%d: %s\r\n" % (i, b"v" * 900) for i in range(40)) + b"\r\n", 431),
    ("space in a header name", b"GET /healthz HTTP/1.1\r\n" + H + b"Bad Name: x\r\n\r\n", 400),
    ("control character in a header", b"GET /healthz HTTP/1.1\r\n" + H
     + b"X-A: a\x01b\r\n\r\n", 400),
    ("two Host headers", b"GET /healthz HTTP/1.1\r\n" + H + H + b"\r\n", 400),
    ("two Content-Lengths", b"POST /v1/models HTTP/1.1\r\n" + H
     + b"Content-Length: 2\r\nContent-Length: 3\r\n\r\n{}", 400),
    ("Content-Length and chunked", b"POST /v1/models HTTP/1.1\r\n" + H
     + b"Content-Length: 2\r\nTransfer-Encoding: chunked\r\n\r\n2\r\n{}\r\n0\r\n\r\n", 400),
    ("negative Content-Length", b"POST /v1/models HTTP/1.1\r\n" + H
     + b"Content-Length: -2\r\n\r\n", 400),
    ("gzip without chunked", b"POST /v1/models HTTP/1.1\r\n" + H
     + b"Transfer-Encoding: gzip\r\n\r\n", 400),
    ("unknown transfer coding", b"POST /v1/models HTTP/1.1\r\n" + H
     + b"Transfer-Encoding: rot13, chunked\r\n\r\n0\r\n\r\n", 501),
    ("unknown expectation", b"POST /v1/models HTTP/1.1\r\n" + H
     + b"Expect: 200-ok\r\nContent-Length: 2\r\n\r\n{}", 417),
]


@pytest.fixture(scope="module")
def served(sqlite_template: Path, tmp_path_factory: pytest.TempPathFactory
           ) -> Iterator[tuple[str, Path]]:
    folder = tmp_path_factory.mktemp("malformed")
    shutil.copyfile(sqlite_template, folder / "keelson.db")
    with predicting_server(f"sqlite:///{folder / 'keelson.db'}", folder,
                           KEELSON_ACCESS_LOG="1") as base:
        yield base, folder / "api.log"


@pytest.mark.parametrize(("case", "data", "status"), CASES, ids=[c[0] for c in CASES])
def test_a_malformed_request_is_a_problem_with_the_usual_headers(
        served: tuple[str, Path], case: str, data: bytes, status: int) -> None:
    connection = RawHttp(served[0], timeout=30)
    connection.send(data)
    answer = connection.answer()
    assert connection.closed_by_server()  # after a malformed request, nothing is trusted
    connection.close()
    assert_usual_answer(answer, status)
    assert answer.headers["connection"] == "close"
    problem = answer.json()
    assert set(problem) == {"type", "title", "status", "detail"}
    assert LEAK not in problem["detail"] and "gunicorn" not in answer.body.decode().lower()
    assert "Invalid" not in problem["detail"]  # no parser exception names


def test_nothing_a_malformed_request_sent_reaches_the_log(served: tuple[str, Path]) -> None:
    base, log = served
    for _case, data, _status in CASES:
        connection = RawHttp(base, timeout=30)
        connection.send(data)
        connection.answer()
        connection.close()
    assert ask(base, "GET", "/healthz").status == 200  # and the server is still there
    text = log.read_text()
    assert "refused a request" in text
    assert LEAK not in text
