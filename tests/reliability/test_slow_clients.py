"""Slow and stalled clients against a directly exposed ``keelson serve``.

Held: with 256 connections open that each sent part of a request and wait
(half a head, nothing at all, a head and part of its body, part of a chunked
body), a normal client's ``/healthz`` and GET prediction (integrated
gradients) answer within their p99 without those connections plus 50 ms (our
own target; gunicorn's sync and gthread workers held a thread per such
connection, and 8 of them were enough for ``/healthz`` to time out). Clients
that pipeline requests and never read the answers hold no thread either. A
request that does not arrive in time is answered 408 and closed; a silent
connection is closed.

``-s`` prints one JSON line of figures (``slow-client figures: {...}``); the
README's row comes from ``KEELSON_SLOW_CLIENT_SAMPLES=500 pytest
tests/reliability/test_slow_clients.py -s``.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import socket
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from tests.reliability.harness import ADMIN, wait_for
from tests.reliability.probes import (
    PREDICT,
    RawHttp,
    address,
    answered,
    ask,
    assert_usual_answer,
    predicting_server,
    request_bytes,
    timed,
)

pytestmark = pytest.mark.slow
HELD = 256
SAMPLES = int(os.environ.get("KEELSON_SLOW_CLIENT_SAMPLES", "120"))
MARGIN_S = 0.050
AUTH = {"Authorization": f"Bearer {ADMIN}"}


def partial_head() -> bytes:
    return b"GET /healthz HTTP/1.1\r\nHost: x\r\n"


def nothing() -> bytes:
    return b""


def partial_body() -> bytes:
    return request_bytes("POST", "/v1/models/pump-risk/records",
                         {**AUTH, "Content-Type": "text/csv", "Content-Length": "1000"},
                         b"key,vibration_rms,pump_family,has_vfd,failed_within_30d\r\n")


def partial_chunks() -> bytes:
    return request_bytes("POST", "/v1/models/pump-risk/records",
                         {**AUTH, "Content-Type": "text/csv", "Transfer-Encoding": "chunked"},
                         b"400\r\nkey,vibration_rms")


STALLS: list[Callable[[], bytes]] = [partial_head, nothing, partial_body, partial_chunks]


@contextlib.contextmanager
def held_connections(base: str, count: int) -> Iterator[list[RawHttp]]:
    held: list[RawHttp] = []
    try:
        for i in range(count):
            connection = RawHttp(base, timeout=10)
            data = STALLS[i % len(STALLS)]()
            if data:
                connection.send(data)
            held.append(connection)
        yield held
    finally:
        for connection in held:
            connection.close()


def p99(samples: list[float]) -> float:
    ordered = sorted(samples)
    return ordered[min(len(ordered) - 1, int(0.99 * len(ordered)))]


def latencies(base: str, target: str, count: int) -> list[float]:
    return [timed(base, target) for _ in range(count)]


def test_256_stalled_connections_leave_health_and_predictions_at_their_usual_p99(
        sqlite_url: str, tmp_path: Path) -> None:
    # The stalled connections must stay open for the whole measurement.
    with predicting_server(sqlite_url, tmp_path, KEELSON_HEADER_TIMEOUT="600",
                           KEELSON_BODY_TIMEOUT="600") as base:
        for target in ("/healthz", PREDICT):  # warm both routes (imports, version cache)
            latencies(base, target, 5)
        idle: dict[str, list[float]] = {"/healthz": [], PREDICT: []}
        held: dict[str, list[float]] = {"/healthz": [], PREDICT: []}
        for _ in range(2):  # interleaved, so a busy moment of the machine hits both
            for target in idle:
                idle[target] += latencies(base, target, SAMPLES // 2)
            with held_connections(base, HELD) as stalled:
                for target in held:
                    held[target] += latencies(base, target, SAMPLES // 2)
                still_open = sum(connection.still_open() for connection in stalled)
            assert still_open == HELD  # none was answered or closed meanwhile
    figures = {
        "held_connections": HELD, "samples_per_route": SAMPLES,
        **{f"{name}_p99_ms_{phase}": round(1000 * p99(samples[target]), 1)
           for name, target in (("healthz", "/healthz"), ("predict_ig", PREDICT))
           for phase, samples in (("idle", idle), ("held", held))},
    }
    print("slow-client figures:", json.dumps(figures))
    for target in idle:
        assert p99(held[target]) <= p99(idle[target]) + MARGIN_S, figures


def test_clients_that_never_read_their_answers_hold_no_thread(
        sqlite_url: str, tmp_path: Path) -> None:
    """16 connections pipeline 400 requests for the API document each and read
    nothing; the server's threads (2 processes x 4) must not wait on them."""
    with predicting_server(sqlite_url, tmp_path) as base:
        usual = latencies(base, "/healthz", 20)
        readers: list[socket.socket] = []
        try:
            for _ in range(16):
                sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
                sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
                sock.connect(address(base))
                sock.sendall(request_bytes("GET", "/openapi.json") * 400)
                readers.append(sock)
            # The server answers until the kernel's buffers for them are full
            # (a few MB each), then waits for the readers without a thread.
            wait_for(settled(lambda: answered(base, "/openapi.json")), timeout=60, every=0.5)
            during = latencies(base, "/healthz", 40)
            parked = answered(base, "/openapi.json")
        finally:
            for sock in readers:
                sock.close()
    assert parked < 16 * 400  # the readers did stop the server writing to them
    assert p99(during) <= p99(usual) + MARGIN_S, (usual, during)


def settled(count: Callable[[], float]) -> Callable[[], bool]:
    """True once ``count`` stops moving between two calls (and is not 0)."""
    last = [-1.0]

    def check() -> bool:
        now = count()
        done = now == last[0] and now > 0
        last[0] = now
        return done

    return check


def test_a_request_that_does_not_arrive_in_time_is_answered_408(
        sqlite_url: str, tmp_path: Path) -> None:
    with predicting_server(sqlite_url, tmp_path, KEELSON_HEADER_TIMEOUT="1",
                           KEELSON_BODY_TIMEOUT="1") as base:
        for stall in (partial_head, partial_body, partial_chunks):
            connection = RawHttp(base, timeout=30)
            connection.send(stall())
            answer = connection.answer()  # the server speaks first, after its time-out
            assert_usual_answer(answer, 408)
            assert answer.headers["connection"] == "close"
            assert connection.closed_by_server()
            connection.close()
        silent = RawHttp(base, timeout=30)
        assert silent.closed_by_server()  # nothing was asked, nothing is answered
        assert silent.pending == b""
        silent.close()
        refused = ask(base, "GET", "/metrics").body.decode()
    assert re.search(r'^keelson_http_refused_total\{status="408"\} 3\.0$', refused, re.MULTILINE)
