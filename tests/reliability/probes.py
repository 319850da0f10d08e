"""What the transport probes share: raw HTTP/1.1 over a socket (requests
written byte by byte as an attacker or a careless client would), a server
fixture with a predicting model, and checks every answer must pass.
"""

from __future__ import annotations

import contextlib
import json
import socket
import time
import urllib.parse
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from prometheus_client.parser import text_string_to_metric_families

from service.web.app import SECURITY_HEADERS
from service.web.extensions import get_database
from tests.reliability.harness import ADMIN, api_server
from tests.service.conftest import build_app
from tests.service.helpers import ApiClient, create_model
from tests.service.predictions_factory import add_version, pump_rows, pump_rule, train_learner

PREDICT = ("/v1/models/pump-risk/predictions?vibration_rms=12.5&pump_family=screw"
           "&has_vfd=true&explain=integrated_gradients")
PROBLEM = "application/problem+json"


@dataclass
class Answer:
    status: int
    headers: dict[str, str] = field(default_factory=dict)
    body: bytes = b""

    def json(self) -> Any:
        return json.loads(self.body)


def address(base: str) -> tuple[str, int]:
    parts = urllib.parse.urlsplit(base)
    return str(parts.hostname), int(parts.port or 80)


class RawHttp:
    """One TCP connection: bytes out as given, answers read and parsed by hand."""

    def __init__(self, base: str, timeout: float = 30.0) -> None:
        self.sock = socket.create_connection(address(base), timeout=timeout)
        self.pending = b""
        self.interims: list[int] = []  # 1xx statuses skipped by answer()

    def send(self, data: bytes) -> None:
        self.sock.sendall(data)

    def _fill(self) -> bool:
        data = self.sock.recv(65536)
        self.pending += data
        return bool(data)

    def answer(self) -> Answer:
        """The next answer (after any 1xx ones, which are skipped and recorded)."""
        while True:
            while b"\r\n\r\n" not in self.pending:
                if not self._fill():
                    raise ConnectionError(f"closed before an answer: {self.pending!r}")
            head, self.pending = self.pending.split(b"\r\n\r\n", 1)
            lines = head.decode("latin-1").split("\r\n")
            status = int(lines[0].split(" ", 2)[1])
            headers = {}
            for line in lines[1:]:
                name, _, value = line.partition(":")
                headers[name.strip().lower()] = value.strip()
            if 100 <= status < 200:
                self.interims.append(status)
                continue
            length = int(headers.get("content-length", "0"))
            while len(self.pending) < length:
                if not self._fill():
                    raise ConnectionError("closed inside an answer body")
            body, self.pending = self.pending[:length], self.pending[length:]
            return Answer(status, headers, body)

    def interim(self) -> int:
        """The status of the next answer, which must be an interim (1xx) one."""
        while b"\r\n\r\n" not in self.pending:
            if not self._fill():
                raise ConnectionError("closed before an answer")
        head, self.pending = self.pending.split(b"\r\n\r\n", 1)
        return int(head.split(b" ", 2)[1])

    def closed_by_server(self) -> bool:
        """True when the server closes the connection (within the socket timeout)."""
        try:
            while self._fill():
                pass
        except ConnectionResetError:
            pass
        return True

    def still_open(self) -> bool:
        """True when the server has neither answered nor closed (nothing to read now)."""
        self.sock.setblocking(False)
        try:
            return not self.sock.recv(1, socket.MSG_PEEK)  # b"": closed
        except BlockingIOError:
            return True
        except OSError:
            return False
        finally:
            self.sock.setblocking(True)

    def close(self) -> None:
        with contextlib.suppress(OSError):
            self.sock.close()


def request_bytes(method: str, target: str, headers: dict[str, str] | None = None,
                  body: bytes = b"", host: str = "keelson.test") -> bytes:
    lines = [f"{method} {target} HTTP/1.1", f"Host: {host}"]
    lines += [f"{name}: {value}" for name, value in (headers or {}).items()]
    return ("\r\n".join(lines) + "\r\n\r\n").encode("latin-1") + body


def ask(base: str, method: str, target: str, headers: dict[str, str] | None = None,
        body: bytes = b"", host: str = "keelson.test", timeout: float = 30.0) -> Answer:
    """One request on a fresh connection."""
    connection = RawHttp(base, timeout)
    try:
        connection.send(request_bytes(method, target, headers, body, host))
        return connection.answer()
    finally:
        connection.close()


def assert_usual_answer(answer: Answer, status: int) -> None:
    """What every answer carries: the status, security headers, a request id,
    and for errors a problem details body (RFC 9457) and never HTML."""
    assert answer.status == status, (answer.status, answer.body[:300])
    for name, value in SECURITY_HEADERS.items():
        assert answer.headers.get(name.lower()) == value, (name, answer.headers)
    assert answer.headers.get("x-request-id"), answer.headers
    if status >= 400:
        assert answer.headers.get("content-type") == PROBLEM, answer.headers
        problem = answer.json()
        assert problem["status"] == status and problem["title"] and problem["detail"]
        assert b"<html" not in answer.body.lower()


def prepare_predicting_database(database_url: str) -> None:
    """The pump-risk model with an active version, written before a server starts."""
    app = build_app(database_url)
    api = ApiClient(app)
    created = create_model(api)
    learner = train_learner(created, pump_rows(64), pump_rule, passes=1)
    add_version(app, "pump-risk", learner.to_bytes(), activate=True)
    get_database(app).engine.dispose()


@contextlib.contextmanager
def predicting_server(database_url: str, tmp_path: Path, **extra: str
                      ) -> Iterator[str]:
    """``keelson serve`` (2 API processes, no worker) over a predicting model."""
    prepare_predicting_database(database_url)
    with api_server(database_url, tmp_path, workers=2, **extra) as (base, _process):
        yield base


def timed(base: str, target: str, token: str | None = ADMIN) -> float:
    """Seconds for one GET on a fresh connection, as a plain client makes it."""
    headers = {"Authorization": f"Bearer {token}"} if token else {}
    started = time.perf_counter()
    answer = ask(base, "GET", target, headers, timeout=5.0)
    took = time.perf_counter() - started
    assert answer.status == 200, (target, answer.status, answer.body[:300])
    return took


def answered(base: str, route: str) -> float:
    """Requests the server counted for ``route`` (its /metrics, all processes)."""
    text = ask(base, "GET", "/metrics", timeout=5.0).body.decode()
    return sum(sample.value for family in text_string_to_metric_families(text)
               if family.name == "keelson_http_requests" for sample in family.samples
               if sample.name.endswith("_total") and sample.labels["route"] == route)


def aligned_csv(header: str, rests: list[str], limit: int) -> tuple[bytes, int]:
    """A CSV (``key`` first) whose first ``limit`` bytes end exactly at a row
    boundary, and how many rows they hold: cut at the limit, it is a valid,
    shorter CSV, the silent loss an over-long body suffered. The first rows'
    keys are padded (at most 150 characters each) to put a boundary there."""
    lines = [f"r{i},{rest}\n" for i, rest in enumerate(rests)]
    used = len(header)
    for line in lines:
        if used + len(line) > limit:
            break
        used += len(line)
    pad = limit - used
    assert pad >= 0 and len(header) + sum(map(len, lines)) > limit + 2 * pad, "too few rows"
    for i in range(len(lines)):
        if pad == 0:
            break
        extra = min(pad, 150)
        lines[i] = f"r{i}{'-' * extra},{rests[i]}\n"
        pad -= extra
    data = (header + "".join(lines)).encode()
    assert data[:limit].endswith(b"\n") and len(data) > limit
    return data, data[:limit].count(b"\n") - 1
