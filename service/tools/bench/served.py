"""The demo model, trained, behind a real `keelson serve` on a free loopback port.

The browser tests (tests/browser/) and `keelson bench page-load` both look at
the pages the way a person would: through gunicorn, over HTTP, from another
process. The database is prepared in this process first (the demo model
created and trained through the API, two named tokens stored), then the server
is started on it without a training worker, so no version appears or moves
while a page is being checked.
"""

from __future__ import annotations

import contextlib
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path

from service.tools.demo import data as demo_data

ROOT = Path(__file__).resolve().parents[3]
ADMIN_TOKEN_NAME = "planner-admin"
PREDICT_TOKEN_NAME = "shift-viewer"
READY_TIMEOUT_SECONDS = 120.0
STOP_TIMEOUT_SECONDS = 30.0


@dataclass(frozen=True)
class Served:
    """Where the server answers and the plaintext of its two tokens."""

    origin: str
    database_url: str
    admin_token: str
    predict_token: str
    model: str = demo_data.MODEL_NAME


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def prepare(database_url: str, records: int, progress: Callable[[str], None],
            full_demo: bool = False) -> tuple[str, str]:
    """Train the demo model on ``database_url`` and store an admin and a predict
    token; returns their plaintexts. ``full_demo`` plays the whole `keelson demo`
    (retrain, scored cases with outcomes, drift) for pages with every part filled."""
    from service.store.database import open_database
    from service.usecases.tokens import create_token

    if full_demo:
        from service.config import load_config
        from service.tools.demo.run import run_demo

        run_demo(load_config({"KEELSON_DATABASE_URL": database_url}), records=records,
                 echo=progress, idle_seconds=0.5)
    else:
        from service.tools.bench.trained import trained_demo

        trained_demo(database_url, records, progress)
    database = open_database(database_url)
    try:
        _, admin = create_token(database, ADMIN_TOKEN_NAME, ["admin"])
        _, predict = create_token(database, PREDICT_TOKEN_NAME, ["predict"])
    finally:
        database.engine.dispose()
    return admin, predict


def _wait_ready(origin: str, process: subprocess.Popen[bytes], log: Path) -> None:
    """Poll /readyz until it answers 200 (the schema is current and the database
    answers); fail at once if the server exits."""
    deadline = time.monotonic() + READY_TIMEOUT_SECONDS
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"keelson serve exited with status {process.returncode}: "
                               f"{log.read_text(errors='replace')[-2000:]}")
        try:
            with urllib.request.urlopen(f"{origin}/readyz", timeout=2) as answer:
                if answer.status == 200:
                    return
        except (urllib.error.URLError, ConnectionError, TimeoutError):
            pass
        time.sleep(0.05)  # the next poll; nothing here assumes how long starting takes
    raise TimeoutError(f"{origin}/readyz did not answer within {READY_TIMEOUT_SECONDS:.0f} s")


@contextlib.contextmanager
def serving(database_url: str, admin_token: str, predict_token: str, workdir: Path,
            extra_env: dict[str, str] | None = None) -> Iterator[Served]:
    """`keelson serve --no-worker` on ``database_url`` for the length of the block."""
    port = free_port()
    origin = f"http://127.0.0.1:{port}"
    metrics = workdir / "metrics"
    metrics.mkdir(parents=True, exist_ok=True)
    env = {**os.environ, "KEELSON_DATABASE_URL": database_url, "KEELSON_WEB_WORKERS": "1",
           "PROMETHEUS_MULTIPROC_DIR": str(metrics), **(extra_env or {})}
    env.pop("KEELSON_ADMIN_TOKEN", None)  # only the two stored, named tokens open the pages
    log = workdir / "serve.log"
    with log.open("wb") as sink:
        process = subprocess.Popen(
            [sys.executable, "-m", "service", "serve", "--host", "127.0.0.1", "--port",
             str(port), "--no-worker"], cwd=ROOT, env=env, stdout=sink,
            stderr=subprocess.STDOUT, process_group=0)
        try:
            _wait_ready(origin, process, log)
            yield Served(origin, database_url, admin_token, predict_token)
        finally:
            if process.poll() is None:
                os.killpg(process.pid, signal.SIGTERM)
                try:
                    process.wait(timeout=STOP_TIMEOUT_SECONDS)
                except subprocess.TimeoutExpired:
                    os.killpg(process.pid, signal.SIGKILL)
                    process.wait()
