"""``keelson bench http``: the API under load on loopback, SQLite and PostgreSQL.

For each database: a scratch database is migrated, loaded with the invented
pump-station records and trained in process until a version is active; then a
real gunicorn (``service.web.server``, 2 workers) serves it on a free
loopback port and ``wrk`` (a bounded HTTP load generator, fixed connections
and duration) measures:

* ``trivial``: ``GET /healthz``, a JSON answer with no database call, the
  ceiling of this stack on this machine;
* ``predict_integrated_gradients`` and ``predict_gradient``: ``GET`` one
  explained prediction;
* ``ingest_http``: ``POST`` 1,000 records per request (no keys, so every
  request stores all of them);

beside ``raw_insert``: the same rows written with one SQLAlchemy Core
executemany per 1,000 rows into the same database, no HTTP, no validation.

Each route also reports the CPU time the server (gunicorn's master and
workers, from /proc) and wrk spent per request: other work on a shared
machine moves requests/s and latency a lot, and CPU per request far less.
"""

from __future__ import annotations

import contextlib
import json
import os
import platform
import re
import resource
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any
from urllib.parse import urlencode

import click

from service.tools.bench.scratch import scratch_postgres
from service.tools.bench.trained import trained_demo
from service.tools.demo import data as demo_data

Progress = Callable[[str], None]
WEB_WORKERS = 2
INGEST_BATCH = 1000
RAW_INSERT_BATCHES = 20
TRAINING_RECORDS = 3000


def run_http_bench(duration: int = 10, connections: int = 16, postgres_url: str | None = None,
                   progress: Progress = lambda _: None) -> dict[str, Any]:
    """Measure and return one JSON-ready object (see the module docstring)."""
    wrk = shutil.which("wrk")
    if wrk is None:
        raise click.ClickException(
            "keelson bench http needs wrk, the HTTP load generator, on PATH "
            "(Debian/Ubuntu: apt-get install wrk). Nothing was measured.")
    result: dict[str, Any] = {
        "benchmark": "http",
        "machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                    "platform": platform.platform(),
                    # Other work on the machine skews every figure: say how much there was.
                    "load_average_1m_at_start": round(os.getloadavg()[0], 2)},
        "settings": {"web_workers": WEB_WORKERS, "connections": connections,
                     "duration_s_per_route": duration, "ingest_batch": INGEST_BATCH,
                     "load_generator": _wrk_version(wrk)},
    }
    with tempfile.TemporaryDirectory(prefix="keelson-bench-") as scratch:
        result["sqlite"] = _measure(f"sqlite:///{scratch}/bench.db", Path(scratch), wrk,
                                    duration, connections, progress)
        if postgres_url:
            with scratch_postgres(postgres_url) as url:
                result["postgresql"] = _measure(url, Path(scratch), wrk, duration,
                                                connections, progress)
        else:
            result["postgresql"] = {"skipped": "no --postgres-url (or "
                                               "KEELSON_BENCH_POSTGRES_URL) given"}
    result["machine"]["load_average_1m_at_end"] = round(os.getloadavg()[0], 2)
    return result


def _measure(url: str, scratch: Path, wrk: str, duration: int, connections: int,
             progress: Progress) -> dict[str, Any]:

    trained = trained_demo(url, TRAINING_RECORDS, progress)
    backend, token = trained.backend, trained.token

    features = demo_data.SHOWCASE[0][1]
    query = {k: str(v).lower() if isinstance(v, bool) else v for k, v in features.items()}
    predict = f"/v1/models/{demo_data.MODEL_NAME}/predictions?"
    batch = [{"features": r["features"], "label": r["label"]}
             for r in demo_data.generate_records(INGEST_BATCH, seed=12)]
    (scratch / "ingest.json").write_text(json.dumps({"records": batch}))
    body_path = scratch / "ingest.lua"
    body_path.write_text(_post_script(scratch / "ingest.json"))

    figures: dict[str, Any] = {}
    with _gunicorn(url, token, scratch / f"gunicorn-{backend}.log") as (base, server):
        auth = f"Authorization: Bearer {token}"
        for name, path, headers, script in [
            ("trivial", "/healthz", [], None),
            ("predict_integrated_gradients",
             predict + urlencode({**query, "explain": "integrated_gradients"}), [auth], None),
            ("predict_gradient", predict + urlencode({**query, "explain": "gradient"}),
             [auth], None),
        ]:
            progress(f"[{backend}] wrk {name}: {connections} connections, {duration} s")
            figures[name] = _wrk(wrk, base + path, headers, script, duration, connections,
                                 server)
        progress(f"[{backend}] wrk ingest_http: {INGEST_BATCH} records per request")
        ingest = _wrk(wrk, base + f"/v1/models/{demo_data.MODEL_NAME}/records",
                      [auth, "Content-Type: application/json"], body_path, duration,
                      connections, server)
        ingest["records_per_s"] = round(ingest["requests_per_s"] * INGEST_BATCH, 1)
        figures["ingest_http"] = ingest
    progress(f"[{backend}] raw bulk insert of the same rows")
    figures["raw_insert"] = _raw_insert(url, batch)
    ceiling = figures["trivial"]["requests_per_s"] or float("nan")
    figures["ratios"] = {
        "integrated_gradients_to_trivial":
            round(figures["predict_integrated_gradients"]["requests_per_s"] / ceiling, 3),
        "gradient_to_trivial": round(figures["predict_gradient"]["requests_per_s"] / ceiling, 3),
        "ingest_http_to_raw_insert":
            round(ingest["records_per_s"] / figures["raw_insert"]["records_per_s"], 3),
        # The same ratio had both routes been held to the server's CPU alone:
        # trivial's CPU per request over the prediction's.
        "integrated_gradients_to_trivial_by_server_cpu": _cpu_ratio(
            figures["trivial"], figures["predict_integrated_gradients"]),
    }
    return figures


def _cpu_ratio(ceiling: dict[str, Any], route: dict[str, Any]) -> float | None:
    fast, slow = ceiling["server_cpu_us_per_request"], route["server_cpu_us_per_request"]
    return round(fast / slow, 3) if fast and slow else None


def _post_script(body: Path) -> str:
    # wrk's Lua: every request of the run POSTs the file's bytes.
    return (f'local f = assert(io.open("{body}", "rb"))\n'
            'wrk.method = "POST"\nwrk.body = f:read("*a")\nf:close()\n')


def _wrk_version(wrk: str) -> str:
    done = subprocess.run([wrk, "--version"], capture_output=True, text=True, check=False)
    text = (done.stdout + done.stderr).strip().splitlines()
    return text[0] if text else "wrk"


_UNIT_MS = {"us": 0.001, "ms": 1.0, "s": 1000.0, "m": 60_000.0}


def _to_ms(text: str) -> float:
    match = re.fullmatch(r"([\d.]+)(us|ms|s|m)", text.strip())
    if match is None:
        raise ValueError(f"unexpected wrk latency {text!r}")
    return round(float(match.group(1)) * _UNIT_MS[match.group(2)], 3)


def parse_wrk(output: str) -> dict[str, Any]:
    """requests/s, p50/p90/p99 latency and error counts from ``wrk --latency`` output."""
    figures: dict[str, Any] = {}
    rate = re.search(r"Requests/sec:\s+([\d.]+)", output)
    total = re.search(r"(\d+) requests in", output)
    if rate is None or total is None:
        raise click.ClickException(f"could not read wrk's output:\n{output}")
    figures["requests_per_s"] = float(rate.group(1))
    figures["requests"] = int(total.group(1))
    for percentile in ("50", "90", "99"):
        found = re.search(rf"^\s+{percentile}(?:\.000)?%\s+(\S+)", output, re.MULTILINE)
        figures[f"p{percentile}_ms"] = _to_ms(found.group(1)) if found else None
    non_2xx = re.search(r"Non-2xx or 3xx responses:\s+(\d+)", output)
    errors = re.search(r"Socket errors: connect (\d+), read (\d+), write (\d+), timeout (\d+)",
                       output)
    figures["non_2xx"] = int(non_2xx.group(1)) if non_2xx else 0
    figures["socket_errors"] = sum(int(g) for g in errors.groups()) if errors else 0
    return figures


def _wrk(wrk: str, url: str, headers: list[str], script: Path | None, duration: int,
         connections: int, server: int) -> dict[str, Any]:
    command = [wrk, f"-t{min(2, connections)}", f"-c{connections}", f"-d{duration}s",
               "--latency", "--timeout", "30s"]
    for header in headers:
        command += ["-H", header]
    if script is not None:
        command += ["-s", str(script)]
    server_before = _tree_cpu_seconds(server)
    wrk_before = _children_cpu_seconds()
    done = subprocess.run([*command, url], capture_output=True, text=True, check=False,
                          timeout=duration + 60)
    wrk_cpu = _children_cpu_seconds() - wrk_before
    server_after = _tree_cpu_seconds(server)
    if done.returncode != 0:
        raise click.ClickException(f"wrk failed ({done.returncode}): {done.stderr.strip()}")
    figures = parse_wrk(done.stdout)
    # CPU time per request: what each answer costs the server (and the load
    # generator), a figure that other work on the machine skews far less than
    # requests/s and latency.
    count = max(figures["requests"], 1)
    figures["server_cpu_us_per_request"] = (
        None if server_before is None or server_after is None
        else round((server_after - server_before) / count * 1e6, 1))
    figures["load_generator_cpu_us_per_request"] = round(wrk_cpu / count * 1e6, 1)
    if figures["non_2xx"]:
        figures["warning"] = "some answers were not 2xx; see the server log"
    return figures


def _children_cpu_seconds() -> float:
    used = resource.getrusage(resource.RUSAGE_CHILDREN)  # waited-for children: wrk
    return used.ru_utime + used.ru_stime


def _tree_cpu_seconds(pid: int) -> float | None:
    """User + system CPU of a process and its descendants (gunicorn's master and
    workers) from /proc; None where there is no /proc."""
    tick = os.sysconf("SC_CLK_TCK")
    total, pending = 0.0, [pid]
    try:
        while pending:
            current = pending.pop()
            with open(f"/proc/{current}/stat") as stat:
                fields = stat.read().rsplit(")", 1)[1].split()
            total += (int(fields[11]) + int(fields[12])) / tick  # utime, stime
            with open(f"/proc/{current}/task/{current}/children") as children:
                pending.extend(int(child) for child in children.read().split())
    except OSError:
        return None
    return total


def _raw_insert(url: str, batch: list[dict[str, Any]]) -> dict[str, Any]:
    from sqlalchemy import insert, select

    from service.store.database import make_engine
    from service.store.tables import ModelRow, RecordRow, utcnow

    engine = make_engine(url)
    try:
        with engine.begin() as connection:
            model_id = connection.scalar(
                select(ModelRow.id).where(ModelRow.name == demo_data.MODEL_NAME))
        rows = [{"model_id": model_id, "key": None, "features": r["features"],
                 "label": r["label"], "split": "train", "received_at": utcnow()}
                for r in batch]
        started = time.perf_counter()
        for _ in range(RAW_INSERT_BATCHES):
            with engine.begin() as connection:
                connection.execute(insert(RecordRow), rows)
        seconds = time.perf_counter() - started
    finally:
        engine.dispose()
    count = RAW_INSERT_BATCHES * len(rows)
    return {"records": count, "seconds": round(seconds, 3),
            "records_per_s": round(count / seconds, 1)}


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@contextlib.contextmanager
def _gunicorn(url: str, token: str, log: Path) -> Iterator[tuple[str, int]]:
    port = _free_port()
    metrics = tempfile.mkdtemp(prefix="keelson-bench-metrics-")
    env = {**os.environ, "KEELSON_DATABASE_URL": url, "KEELSON_ADMIN_TOKEN": token,
           "KEELSON_HOST": "127.0.0.1", "KEELSON_PORT": str(port),
           "KEELSON_WEB_WORKERS": str(WEB_WORKERS), "KEELSON_ACCESS_LOG": "0",
           "PROMETHEUS_MULTIPROC_DIR": metrics}
    with log.open("wb") as sink:
        server = subprocess.Popen(
            [sys.executable, "-m", "gunicorn", "--config", "python:service.web.server"],
            env=env, stdout=sink, stderr=subprocess.STDOUT, process_group=0)
        base = f"http://127.0.0.1:{port}"
        try:
            _wait_ready(base + "/readyz", server, log)
            yield base, server.pid
        finally:
            if server.poll() is None:
                os.killpg(server.pid, signal.SIGTERM)
                try:
                    server.wait(timeout=30)
                except subprocess.TimeoutExpired:
                    os.killpg(server.pid, signal.SIGKILL)
                    server.wait()
            shutil.rmtree(metrics, ignore_errors=True)


def _wait_ready(url: str, server: subprocess.Popen[bytes], log: Path) -> None:
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        if server.poll() is not None:
            raise click.ClickException(f"gunicorn exited early; its log:\n{log.read_text()}")
        with contextlib.suppress(urllib.error.URLError, ConnectionError, TimeoutError), \
                urllib.request.urlopen(url, timeout=1) as answer:
            if answer.status == 200:
                return
        time.sleep(0.1)
    raise click.ClickException(f"gunicorn did not become ready; its log:\n{log.read_text()}")
