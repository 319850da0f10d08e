"""`keelson demo` end to end, and `keelson demo --serve` (what `make run` does).

Our own contract (README, "The demo"); the data is invented, so no figure of it is checked,
only that the loop runs and the explanations name the declared fields.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest
from click.testing import CliRunner

from service.tools.cli import cli
from service.tools.demo.data import model_spec
from tests.product.servers import ROOT, free_port

FIELDS = [f["name"] for f in model_spec()["features"]]


def _demo(database_url: str, *args: str) -> str:
    result = CliRunner().invoke(cli, ["demo", "--records", "600", *args],
                                env={"KEELSON_DATABASE_URL": database_url},
                                prog_name="keelson")
    assert result.exit_code == 0, result.output + repr(result.exception)
    return result.output


@pytest.mark.slow
def test_the_demo_runs_to_the_end_and_explains_every_declared_field(sqlite_url: str) -> None:
    output = _demo(sqlite_url)
    assert "INVENTED" in output
    assert "Created model 'pump-risk'" in output
    assert re.search(r"retrain job \d+ wrote version \d+", output)
    assert re.search(r"^\s+\d+ retrain ", output, re.MULTILINE)  # in the versions table
    predictions = re.findall(r"^(.+): P\(failed within 30 days\) = (0\.\d\d|1\.00)", output,
                             re.MULTILINE)
    assert len(predictions) == 4
    for field in FIELDS:
        # One explanation line per field per prediction: name, value, signed attribution.
        lines = re.findall(rf"^  {field} +.+ [+-]\d\.\d{{3}} .*\|", output, re.MULTILINE)
        assert len(lines) == 4, (field, output)
    assert output.count("attributions sum to P(x) - P(baseline) within") == 4
    # The second act: keyed cases scored, their outcomes sent as CSV, then the
    # track record (with calibration and alarm) and a drift line per field.
    assert "1000 outcomes accepted, 0 already known" in output
    assert re.search(r"^  version \d+ \(active\): 1000 outcomes; accuracy ", output, re.MULTILINE)
    assert "calibration: predicted P(failed)" in output
    assert re.search(r"change alarm of the active version: (calm|raised since)", output)
    for field in FIELDS:
        assert re.search(rf"^  {field} +PSI \d\.\d{{3}}  (steady|shifting|shifted)", output,
                         re.MULTILINE), (field, output)
    assert re.search(r"^(Moved since training: .+|No field has moved past PSI 0\.1\.)$", output,
                     re.MULTILINE)
    for caution in ("decision support", "a person reviews it", "local data",
                    "licensed professional practice"):
        assert caution in output


@pytest.mark.slow
def test_running_the_demo_again_stores_nothing_twice(sqlite_url: str) -> None:
    _demo(sqlite_url, "--no-retrain")
    again = _demo(sqlite_url, "--no-retrain")
    assert "already exists: reusing it" in again
    assert "0 stored, 600 duplicates" in again
    assert "0 outcomes accepted, 1000 already known" in again
    # The first run's outcomes became records after its training: the second
    # run learns those, and nothing else is new.
    quiet = _demo(sqlite_url, "--no-retrain", "--cases", "0")
    assert "Already trained" in quiet


@pytest.mark.slow
def test_demo_serve_prints_where_and_how_then_serves_and_stops_cleanly(
        sqlite_url: str, tmp_path: Path) -> None:
    port = free_port()
    env = {**os.environ, "KEELSON_DATABASE_URL": sqlite_url, "KEELSON_WEB_WORKERS": "1",
           "PROMETHEUS_MULTIPROC_DIR": str(tmp_path / "metrics")}
    env.pop("KEELSON_ADMIN_TOKEN", None)
    out_path, err_path = tmp_path / "out.log", tmp_path / "err.log"
    # Files, not pipes: a pipe nobody reads fills up and blocks the server's logging.
    with out_path.open("w") as out, err_path.open("w") as err:
        process = subprocess.Popen(
            [sys.executable, "-m", "service", "demo", "--records", "300", "--no-retrain",
             "--serve", "--port", str(port)],
            cwd=ROOT, env=env, stdout=out, stderr=err, text=True, process_group=0)
    try:
        token = _printed_token(out_path, port, process, err_path)
        base = f"http://127.0.0.1:{port}"
        query = "&".join(f"{k}={str(v).lower()}" for k, v in [
            ("vibration_rms", 4.0), ("bearing_temp_c", 60), ("motor_current_dev_pct", 1),
            ("hours_since_service", 100), ("starts_per_day", 5), ("pump_family", "screw"),
            ("has_vfd", True)])
        body = _get_when_up(f"{base}/v1/models/pump-risk/predictions?{query}&explain=gradient",
                            token, process)
        assert set(body["explanation"]["attributions"]) == set(FIELDS)
        assert body["explanation"]["method"] == "gradient"
        os.killpg(process.pid, signal.SIGINT)  # Ctrl-C in a terminal
        assert process.wait(timeout=60) == 0
    finally:
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait()


def _printed_token(out: Path, port: int, process: subprocess.Popen[str], err: Path) -> str:
    """The line after "Serving on <address> ...", once the demo has printed it."""
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        assert process.poll() is None, err.read_text()
        lines = out.read_text().splitlines()
        for index, line in enumerate(lines):
            if line.startswith(f"Serving on http://127.0.0.1:{port} "):
                rest = [x.strip() for x in lines[index + 1:] if x.strip()]
                if rest:
                    return rest[0]
        time.sleep(0.2)
    raise TimeoutError(out.read_text() + err.read_text())


def _get_when_up(url: str, token: str, process: subprocess.Popen[str]) -> dict:
    deadline = time.monotonic() + 120
    while True:
        assert process.poll() is None
        try:
            request = urllib.request.Request(url, headers={"Authorization": f"Bearer {token}"})
            with urllib.request.urlopen(request, timeout=5) as answer:
                return json.loads(answer.read())
        except urllib.error.HTTPError:
            raise
        except OSError:  # not listening yet
            if time.monotonic() > deadline:
                raise
            time.sleep(0.2)
