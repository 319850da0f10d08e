"""The gunicorn logger builds access-log fields only when the line is written.

Each case runs in a child process: importing service.gunicorn_conf sets the
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
import service.gunicorn_conf as conf

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
