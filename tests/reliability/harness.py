"""What the reliability tests share: real servers on loopback, a JSON client
that keeps its connection, and a TCP proxy to cut the database off.

Everything binds 127.0.0.1 on free ports, writes logs to files, and is stopped
by process group in ``finally`` blocks.
"""

from __future__ import annotations

import contextlib
import http.client
import json
import os
import signal
import socket
import subprocess
import sys
import threading
import urllib.parse
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

from sqlalchemy.engine import make_url

from tests.product.servers import ROOT, free_port, wait_until_answering
from tests.worker.helpers import wait_until as wait_for  # noqa: F401 - the harness's name for it
from tests.worker.helpers import wait_until_running

ADMIN = "reliability-admin-token"
# Worker settings that make versions appear quickly (idle version after 0.5 s).
FAST_WORKER = {
    "KEELSON_WORKER_IDLE_SECONDS": "0.5",
    "KEELSON_WORKER_POLL_SECONDS": "0.05",
    "KEELSON_WORKER_LEASE_SECONDS": "5",
}


class Client:
    """A JSON client on one keep-alive connection; reconnects after a failure."""

    def __init__(self, base: str, token: str | None = ADMIN, timeout: float = 30.0) -> None:
        parts = urllib.parse.urlsplit(base)
        self.host, self.port = str(parts.hostname), int(parts.port or 80)
        self.token, self.timeout = token, timeout
        self.connection: http.client.HTTPConnection | None = None

    def request(self, method: str, path: str, body: Any = None, *, raw: bytes | None = None,
                content_type: str = "application/json",
                headers: Mapping[str, str] | None = None) -> tuple[int, Any, dict[str, str]]:
        """(status, parsed JSON body or raw text, headers); raises OSError when
        the connection fails (the caller decides whether that counts)."""
        sent = {"Content-Type": content_type, **(headers or {})}
        if self.token is not None:
            sent["Authorization"] = f"Bearer {self.token}"
        data = raw if raw is not None else (None if body is None else json.dumps(body).encode())
        for attempt in (0, 1):
            if self.connection is None:
                self.connection = http.client.HTTPConnection(self.host, self.port,
                                                             timeout=self.timeout)
            try:
                self.connection.request(method, path, body=data, headers=sent)
                answer = self.connection.getresponse()
                payload = answer.read()
                break
            except (http.client.RemoteDisconnected, BrokenPipeError, ConnectionResetError):
                # A keep-alive connection the server closed between requests:
                # open a new one once (the request never reached a view).
                self.close()
                if attempt:
                    raise
        answer_headers = {k.lower(): v for k, v in answer.getheaders()}
        if answer_headers.get("connection", "").lower() == "close":
            self.close()
        text = payload.decode("utf-8", "replace")
        try:
            parsed: Any = json.loads(text) if text else None
        except ValueError:
            parsed = text
        return answer.status, parsed, answer_headers

    def close(self) -> None:
        if self.connection is not None:
            self.connection.close()
            self.connection = None


def server_env(database_url: str, tmp_path: Path, **extra: str) -> dict[str, str]:
    return {
        "KEELSON_DATABASE_URL": database_url,
        "KEELSON_ADMIN_TOKEN": ADMIN,
        "PROMETHEUS_MULTIPROC_DIR": str(tmp_path / "metrics"),
        "KEELSON_ACCESS_LOG": "0",
        "PYTHONPATH": str(ROOT),
        **FAST_WORKER,
        **extra,
    }


def start_group(command: list[str], env: Mapping[str, str], log: Path
                ) -> subprocess.Popen[bytes]:
    """``command`` in its own process group, output appended to ``log``."""
    with log.open("ab") as sink:
        return subprocess.Popen(command, env={**os.environ, **env}, cwd=ROOT, stdout=sink,
                                stderr=subprocess.STDOUT, process_group=0)


def stop_group(process: subprocess.Popen[bytes], signum: int = signal.SIGTERM,
               timeout: float = 30.0) -> int | None:
    """Signal the whole group; SIGKILL it if it does not end in ``timeout``."""
    if process.poll() is None:
        with contextlib.suppress(ProcessLookupError):
            os.killpg(process.pid, signum)
        try:
            return process.wait(timeout)
        except subprocess.TimeoutExpired:
            pass
    with contextlib.suppress(ProcessLookupError):
        os.killpg(process.pid, signal.SIGKILL)
    process.wait()
    return process.returncode


@contextlib.contextmanager
def api_server(database_url: str, tmp_path: Path, workers: int = 2, with_worker: bool = False,
               gunicorn_only: bool = False, **extra: str
               ) -> Iterator[tuple[str, subprocess.Popen[bytes]]]:
    """``keelson serve`` on a free loopback port; yields (base URL, process).

    ``gunicorn_only``: gunicorn itself (what ``serve`` starts, in a process
    group of its own), so killing the group kills the master and its workers
    at once; the database must already be migrated."""
    port = free_port()
    env = server_env(database_url, tmp_path, KEELSON_HOST="127.0.0.1", KEELSON_PORT=str(port),
                     KEELSON_WEB_WORKERS=str(workers), **extra)
    if gunicorn_only:
        command = [sys.executable, "-m", "gunicorn", "--config", "python:service.web.server"]
    else:
        command = [sys.executable, "-m", "service", "serve", "--host", "127.0.0.1",
                   "--port", str(port), "--workers", str(workers)]
        if not with_worker:
            command.append("--no-worker")
    process = start_group(command, env, tmp_path / "api.log")
    base = f"http://127.0.0.1:{port}"
    try:
        wait_until_answering(f"{base}/healthz", process, timeout=120)
        yield base, process
    finally:
        stop_group(process)


@contextlib.contextmanager
def worker_process(database_url: str, tmp_path: Path, worker_id: str = "reliability",
                   **extra: str) -> Iterator[subprocess.Popen[bytes]]:
    """``python -m service.worker ID`` (what ``keelson worker --id`` runs),
    yielded once it is running (its start line is in ``tmp_path/worker.log``;
    see tests/worker/helpers.py, ``wait_until_running``)."""
    env = server_env(database_url, tmp_path, **extra)
    log = tmp_path / "worker.log"
    since = log.stat().st_size if log.exists() else 0
    process = start_group([sys.executable, "-m", "service.worker", worker_id], env, log)
    try:
        wait_until_running(process, worker_id, log, since)
        yield process
    finally:
        stop_group(process)


class TcpProxy:
    """A loopback TCP relay to ``target``: ``cut()`` closes the listener and every
    relayed connection at once (the database seen as gone: connections reset,
    new ones refused); ``restore()`` listens again on the same port. Lets a test
    take PostgreSQL away from the processes under test without touching the
    shared server other tests use."""

    def __init__(self, target_port: int, target_host: str = "127.0.0.1") -> None:
        self.target = (target_host, target_port)
        self.port = free_port()
        self.listener: socket.socket | None = None
        self.sockets: set[socket.socket] = set()
        self.lock = threading.Lock()
        self.restore()

    def url_for(self, database_url: str) -> str:
        return make_url(database_url).set(host="127.0.0.1", port=self.port).render_as_string(
            hide_password=False)

    def restore(self) -> None:
        listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        listener.bind(("127.0.0.1", self.port))
        listener.listen(64)
        self.listener = listener
        threading.Thread(target=self._accept, args=(listener,), daemon=True).start()

    def cut(self) -> None:
        with self.lock:
            listener, self.listener = self.listener, None
            doomed, self.sockets = self.sockets, set()
        if listener is not None:
            with contextlib.suppress(OSError):
                listener.shutdown(socket.SHUT_RDWR)
            listener.close()
        for sock in doomed:
            with contextlib.suppress(OSError):
                sock.shutdown(socket.SHUT_RDWR)
            sock.close()

    def _accept(self, listener: socket.socket) -> None:
        while True:
            try:
                client, _ = listener.accept()
            except OSError:
                return  # cut
            try:
                upstream = socket.create_connection(self.target, timeout=5)
            except OSError:
                client.close()
                continue
            upstream.settimeout(None)
            with self.lock:
                if self.listener is not listener:  # cut meanwhile
                    client.close()
                    upstream.close()
                    return
                self.sockets.update((client, upstream))
            for source, sink in ((client, upstream), (upstream, client)):
                threading.Thread(target=self._pump, args=(source, sink), daemon=True).start()

    def _pump(self, source: socket.socket, sink: socket.socket) -> None:
        try:
            while data := source.recv(65536):
                sink.sendall(data)
        except OSError:
            pass
        finally:
            for sock in (source, sink):
                with contextlib.suppress(OSError):
                    sock.shutdown(socket.SHUT_RDWR)

    def close(self) -> None:
        self.cut()
