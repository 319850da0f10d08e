"""`keelson serve`: schema upgraded, API and worker side by side, clean stops.

Our own contract (docs/http-api.md, "The `keelson` command"; README,
"Scale-out"); no outside source.
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path
from typing import Any

import pytest

from tests.product.servers import ROOT, free_port, wait_until_answering

pytestmark = pytest.mark.slow
ADMIN = "serve-test-admin"

SPEC = {"name": "xor-gate", "task": "binary", "target": "out",
        "features": [{"name": "a", "type": "boolean"}, {"name": "b", "type": "boolean"}],
        "hidden_layers": [4], "training": {"checkpoint_every": 100, "warmup_records": 8}}


def _start(tmp_path: Path, port: int, *args: str) -> subprocess.Popen[bytes]:
    env = {**os.environ, "KEELSON_DATABASE_URL": f"sqlite:///{tmp_path}/fresh.db",
           "KEELSON_ADMIN_TOKEN": ADMIN, "KEELSON_WEB_WORKERS": "1",
           "KEELSON_WORKER_IDLE_SECONDS": "0.5", "PROMETHEUS_MULTIPROC_DIR": str(tmp_path / "m")}
    log = (tmp_path / "serve.log").open("wb")
    return subprocess.Popen([sys.executable, "-m", "service", "serve", "--port", str(port),
                             *args], cwd=ROOT, env=env, stdout=log, stderr=subprocess.STDOUT,
                            process_group=0)


def _call(method: str, url: str, body: Any = None) -> Any:
    data = None if body is None else json.dumps(body).encode()
    request = urllib.request.Request(url, data=data, method=method, headers={
        "Authorization": f"Bearer {ADMIN}", "Content-Type": "application/json"})
    with urllib.request.urlopen(request, timeout=10) as answer:
        return json.loads(answer.read())


def _stop(process: subprocess.Popen[bytes], signum: int = signal.SIGTERM) -> int:
    if process.poll() is None:
        os.killpg(process.pid, signum)
    try:
        return process.wait(timeout=60)
    except subprocess.TimeoutExpired:
        os.killpg(process.pid, signal.SIGKILL)
        process.wait()
        raise


def test_serve_upgrades_a_new_database_and_its_worker_turns_records_into_versions(
        tmp_path: Path) -> None:
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    server = _start(tmp_path, port)
    try:
        wait_until_answering(f"{base}/readyz", server, timeout=60)  # schema is current
        _call("POST", f"{base}/v1/models", SPEC)
        records = [{"features": {"a": bool(i & 1), "b": bool(i & 2)},
                    "label": bool(i & 1) != bool(i & 2)} for i in range(200)]
        assert _call("POST", f"{base}/v1/models/xor-gate/records",
                     {"records": records}) == {"accepted": 200, "duplicates": 0}
        deadline = time.monotonic() + 60
        while True:  # no call asks for training: the worker beside the API does it
            model = _call("GET", f"{base}/v1/models/xor-gate")
            if model["active_version"] is not None and model["trainer"]["lag"] == 0:
                break
            assert time.monotonic() < deadline, model
            time.sleep(0.2)
        versions = _call("GET", f"{base}/v1/models/xor-gate/versions")["versions"]
        assert versions and all(v["origin"] == "online" for v in versions)
    finally:
        status = _stop(server)
    assert status == 0, (tmp_path / "serve.log").read_text()[-3000:]
    log = (tmp_path / "serve.log").read_text()
    assert "Shutting down: Master" in log  # gunicorn's graceful stop ran


def test_serve_without_worker_trains_nothing(tmp_path: Path) -> None:
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    server = _start(tmp_path, port, "--no-worker")
    try:
        wait_until_answering(f"{base}/readyz", server, timeout=60)
        _call("POST", f"{base}/v1/models", SPEC)
        _call("POST", f"{base}/v1/models/xor-gate/records",
              {"records": [{"features": {"a": True, "b": False}, "label": True}] * 20})
        time.sleep(2)
        model = _call("GET", f"{base}/v1/models/xor-gate")
        assert model["active_version"] is None
        assert model["trainer"]["lag"] == 20
    finally:
        assert _stop(server, signal.SIGINT) == 0


def test_serve_fails_with_a_non_zero_status_when_the_api_cannot_start(tmp_path: Path) -> None:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        server = _start(tmp_path, port)
        try:
            status = server.wait(timeout=120)
        finally:
            if server.poll() is None:
                _stop(server)
    assert status != 0
    assert "the api process exited with status" in (tmp_path / "serve.log").read_text()
