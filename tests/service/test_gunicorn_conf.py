"""gunicorn settings: access-log fields built only when the line is written,
and a loaded worker's objects frozen out of the collector's full passes.

Each case runs in a child process: importing service.web.server sets the
metrics folder in the environment and re-chooses prometheus_client's value
store, which must not leak into the other tests of this process.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

CHILD = r"""
import json, logging, sys
from gunicorn.config import Config
import service.web.server as conf

cfg = Config()
cfg.set("logconfig_dict", conf.logconfig_dict)
logger = conf.logger_class(cfg)
built = []
original = logger.atoms

def counting_atoms(*args):
    built.append(1)
    return {"h": "127.0.0.1", "m": "GET", "U": "/healthz", "q": "", "s": "200",
            "B": "15", "D": "1200", "a": "test", "r": "GET /healthz HTTP/1.1",
            "b": "15", "M": "1", "{x-request-id}o": "req-1"}

logger.atoms = counting_atoms
logger.access(None, None, {}, None)
sys.stdout.flush()
print(json.dumps({"built": len(built)}), file=sys.stderr)
"""


def _run_child(access_log: str, tmp_path: Path) -> tuple[int, list[dict[str, object]]]:
    env = {**os.environ, "KEELSON_ACCESS_LOG": access_log,
           "PROMETHEUS_MULTIPROC_DIR": str(tmp_path / "metrics")}
    done = subprocess.run([sys.executable, "-c", CHILD], env=env, capture_output=True,
                          text=True, timeout=60, check=True,
                          cwd=Path(__file__).resolve().parents[2])
    built = json.loads(done.stderr.strip().splitlines()[-1])["built"]
    lines = [json.loads(line) for line in done.stdout.splitlines() if line.strip()]
    return built, lines


@pytest.mark.parametrize("access_log", ["0", "no"])
def test_a_disabled_access_log_builds_no_fields(access_log: str, tmp_path: Path) -> None:
    built, lines = _run_child(access_log, tmp_path)
    assert built == 0
    assert lines == []


def test_an_enabled_access_log_writes_one_json_line_with_fields(tmp_path: Path) -> None:
    built, lines = _run_child("1", tmp_path)
    assert built == 1
    (line,) = lines
    assert line["logger"] == "gunicorn.access"
    assert line["method"] == "GET" and line["path"] == "/healthz" and line["status"] == 200
    assert line["request_id"] == "req-1"


def test_a_loaded_worker_freezes_what_is_alive(tmp_path: Path) -> None:
    child = ("import gc, service.web.server as conf\n"
             "from service.web.app import create_app\n"
             f"app = create_app({{'KEELSON_DATABASE_URL': 'sqlite:///{tmp_path}/k.db'}})\n"
             "conf.post_worker_init(None)\n"
             "print(gc.get_freeze_count(), len(gc.get_objects()))\n")
    env = {**os.environ, "PROMETHEUS_MULTIPROC_DIR": str(tmp_path / "metrics")}
    done = subprocess.run([sys.executable, "-c", child], env=env, capture_output=True,
                          text=True, timeout=60, check=True,
                          cwd=Path(__file__).resolve().parents[2])
    frozen, still_tracked = map(int, done.stdout.split())
    # The app's objects are frozen; next to nothing is left for a full collection.
    assert frozen > 10_000 and still_tracked < 1_000


def test_an_address_another_server_listens_on_is_refused(tmp_path: Path) -> None:
    # With SO_REUSEPORT a second server could otherwise share the port silently.
    child = """
import socket
from service.web.server import refuse_a_taken_address

with socket.socket() as listener:
    listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEPORT, 1)
    listener.bind(("127.0.0.1", 0))
    listener.listen()
    port = listener.getsockname()[1]
    try:
        refuse_a_taken_address("127.0.0.1", port)
        print("taken port accepted")
    except SystemExit as refusal:
        print("refused:", refusal)
refuse_a_taken_address("127.0.0.1", port)  # closed: free again
print("free again")
"""
    env = {**os.environ, "PROMETHEUS_MULTIPROC_DIR": str(tmp_path / "metrics")}
    done = subprocess.run([sys.executable, "-c", child], env=env, capture_output=True,
                          text=True, timeout=60, check=True,
                          cwd=Path(__file__).resolve().parents[2])
    refused, free = done.stdout.splitlines()
    assert refused.startswith("refused: cannot listen on 127.0.0.1:")
    assert "already in use" in refused and free == "free again"
