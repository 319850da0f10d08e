"""Drift counts under gunicorn: two worker processes count predictions in
memory, each writes its own rows, and a clean stop (SIGTERM to the master)
makes each write what it holds, with a flush interval far longer than the
test: every prediction sent is in the table once, none twice."""

from __future__ import annotations

import signal
import sys
import urllib.request
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest
from sqlalchemy import func, select

from service.store.tables import DriftTallyRow
from service.web.extensions import get_database
from tests.product.servers import free_port, running, wait_until_answering
from tests.service.conftest import build_app
from tests.service.drift_setup import predict_query, pump_model_with_reference
from tests.service.helpers import ADMIN_TOKEN, ApiClient
from tests.service.predictions_factory import pump_rows


@pytest.mark.slow
def test_two_workers_flush_their_counts_when_stopped_cleanly(
        sqlite_url: str, tmp_path: Path) -> None:
    app = build_app(sqlite_url)
    pump_model_with_reference(ApiClient(app))
    port = free_port()
    metrics_dir = tmp_path / "metrics"
    metrics_dir.mkdir()
    env = {"KEELSON_DATABASE_URL": sqlite_url, "KEELSON_HOST": "127.0.0.1",
           "KEELSON_PORT": str(port), "KEELSON_WEB_WORKERS": "2", "KEELSON_THREADS": "2",
           "PROMETHEUS_MULTIPROC_DIR": str(metrics_dir), "KEELSON_ACCESS_LOG": "0",
           "KEELSON_ADMIN_TOKEN": ADMIN_TOKEN, "KEELSON_DRIFT_FLUSH_SECONDS": "3600"}
    base = f"http://127.0.0.1:{port}"
    rows = pump_rows(50, seed=31)
    command = [sys.executable, "-m", "gunicorn", "--config", "python:service.web.server"]
    with running(command, env, tmp_path / "gunicorn.log") as server:
        wait_until_answering(f"{base}/readyz", server, timeout=120)
        sent = 0
        # New connections in rounds until both workers have answered some
        # (each answering worker writes its request counter file).
        while sent == 0 or len(list(metrics_dir.glob("counter_*.db"))) < 2:
            with ThreadPoolExecutor(max_workers=8) as pool:
                list(pool.map(lambda row: _predict(base, row), rows))
            sent += len(rows)
            assert sent < 5000, "the second worker never answered"
        server.send_signal(signal.SIGTERM)
        assert server.wait(timeout=60) == 0
    with get_database(app).read() as session:
        total = session.scalar(select(func.sum(DriftTallyRow.predictions)))
        writers = session.scalar(select(func.count(func.distinct(DriftTallyRow.writer))))
    assert total == sent
    assert writers == 2


def _predict(base: str, row: dict) -> None:
    request = urllib.request.Request(
        f"{base}/v1/models/pump-risk/predictions?{predict_query(row)}",
        headers={"Authorization": f"Bearer {ADMIN_TOKEN}"})
    with urllib.request.urlopen(request, timeout=60) as answer:
        assert answer.status == 200
