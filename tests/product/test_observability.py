"""Metrics, request ids and JSON logs.

Outside checks: /metrics is parsed with prometheus_client's own parser of the
Prometheus text exposition format (reference library: prometheus_client); the
multiprocess mode summing several processes' samples is prometheus_client's
documented behaviour for gunicorn. The rest is our own contract.
"""

from __future__ import annotations

import io
import json
import logging
import sys
import time
import urllib.request
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from service.web.app import create_app
from service.web.observability import RequestIdFilter, json_formatter
from tests.product.servers import free_port, running, wait_until_answering

REQUESTS_METRIC = "keelson_http_requests"  # the parser drops the _total suffix


def _request_count(text: str, route: str) -> float:
    total = 0.0
    for family in text_string_to_metric_families(text):
        if family.name != REQUESTS_METRIC:
            continue
        for sample in family.samples:
            if sample.name.endswith("_total") and sample.labels["route"] == route:
                total += sample.value
    return total


@pytest.mark.slow
def test_request_counters_add_up_across_two_gunicorn_workers(
        sqlite_url: str, tmp_path: Path) -> None:
    port = free_port()
    metrics_dir = tmp_path / "metrics"
    metrics_dir.mkdir()
    env = {"KEELSON_DATABASE_URL": sqlite_url, "KEELSON_HOST": "127.0.0.1",
           "KEELSON_PORT": str(port), "KEELSON_WEB_WORKERS": "2", "KEELSON_THREADS": "1",
           "PROMETHEUS_MULTIPROC_DIR": str(metrics_dir), "KEELSON_ACCESS_LOG": "0"}
    base = f"http://127.0.0.1:{port}"
    command = [sys.executable, "-m", "gunicorn", "--config", "python:service.web.server"]
    with running(command, env, tmp_path / "gunicorn.log") as server:
        # Ready when /readyz answers, never the route counted here: a readiness
        # probe that timed out on the client (1 s) is still answered, and
        # counted, later (101 or 102 of 100 under load). So nothing
        # but the rounds below ever asks for /healthz, and the count starts at 0.
        wait_until_answering(f"{base}/readyz", server, timeout=120)
        assert _request_count(_get(f"{base}/metrics"), "/healthz") == 0
        sent = 0
        # Concurrent clients, a new connection per request, in rounds until both
        # workers have answered some (the kernel decides who accepts; the
        # second worker may still be starting on a busy machine).
        deadline = time.monotonic() + 120
        while sent == 0 or (len(_writers(metrics_dir)) < 2 and time.monotonic() < deadline):
            with ThreadPoolExecutor(max_workers=8) as pool:
                list(pool.map(lambda _: _get(f"{base}/healthz"), range(100)))
            sent += 100
        scraped = [_get(f"{base}/metrics") for _ in range(4)]
    assert len(_writers(metrics_dir)) >= 2  # two worker processes counted requests
    # Every scrape, whichever worker answered it, counts every worker's requests.
    assert [_request_count(text, "/healthz") for text in scraped] == [sent] * 4


def _writers(metrics_dir: Path) -> set[str]:
    """Pids of the processes that wrote counter samples (counter_<pid>.db)."""
    return {p.stem.rsplit("_", 1)[-1] for p in metrics_dir.glob("counter_*.db")}


def _get(url: str) -> str:
    with urllib.request.urlopen(url, timeout=60) as answer:
        return answer.read().decode()


def test_metrics_parse_and_count_requests_by_route_template(sqlite_url: str) -> None:
    client = create_app({"KEELSON_DATABASE_URL": sqlite_url}).test_client()
    before = _request_count(client.get("/metrics").get_data(as_text=True), "/healthz")
    for _ in range(3):
        assert client.get("/healthz").status_code == 200
    answer = client.get("/metrics")
    assert answer.status_code == 200
    assert answer.headers["Content-Type"].startswith("text/plain; version=")
    assert _request_count(answer.get_data(as_text=True), "/healthz") - before == 3
    names = {f.name for f in text_string_to_metric_families(answer.get_data(as_text=True))}
    assert "keelson_http_request_duration_seconds" in names


def test_metrics_label_routes_by_template_not_by_path(sqlite_url: str) -> None:
    client = create_app({"KEELSON_DATABASE_URL": sqlite_url}).test_client()
    client.get("/v1/models/no-such-model")  # 401 without a token: still counted
    text = client.get("/metrics").get_data(as_text=True)
    routes = {s.labels["route"] for f in text_string_to_metric_families(text)
              if f.name == REQUESTS_METRIC for s in f.samples}
    assert "/v1/models/no-such-model" not in routes
    assert any("<" in r and r.startswith("/v1/models/") for r in routes), routes


def test_metrics_need_no_token(sqlite_url: str) -> None:
    client = create_app({"KEELSON_DATABASE_URL": sqlite_url,
                         "KEELSON_ADMIN_TOKEN": "secret-admin"}).test_client()
    assert client.get("/metrics").status_code == 200


def test_every_answer_carries_a_request_id_and_a_sane_given_one_is_echoed(
        sqlite_url: str) -> None:
    client = create_app({"KEELSON_DATABASE_URL": sqlite_url}).test_client()
    fresh = client.get("/healthz").headers["X-Request-Id"]
    assert len(fresh) == 32 and int(fresh, 16) >= 0
    assert client.get("/healthz", headers={"X-Request-Id": "abc-123"}).headers[
        "X-Request-Id"] == "abc-123"
    odd = "bad id <script>" + "x" * 200
    refused = client.get("/healthz", headers={"X-Request-Id": odd})
    assert refused.headers["X-Request-Id"] != odd
    assert len(refused.headers["X-Request-Id"]) == 32
    # Even answers made before any view ran (no token) carry one.
    assert client.get("/v1/models").headers["X-Request-Id"]


def test_log_lines_are_json_with_the_request_id(sqlite_url: str) -> None:
    app = create_app({"KEELSON_DATABASE_URL": sqlite_url})
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(json_formatter())
    handler.addFilter(RequestIdFilter())
    logger = logging.getLogger("keelson.test")
    logger.addHandler(handler)
    logger.setLevel(logging.INFO)
    try:
        with app.test_request_context("/healthz", headers={"X-Request-Id": "req-42"}):
            app.preprocess_request()
            logger.info("inside a request", extra={"model": "m"})
        logger.info("outside")
    finally:
        logger.removeHandler(handler)
    inside, outside = (json.loads(line) for line in stream.getvalue().splitlines())
    assert inside["message"] == "inside a request"
    assert inside["request_id"] == "req-42"
    assert inside["level"] == "INFO" and inside["logger"] == "keelson.test"
    assert inside["model"] == "m"
    assert outside["request_id"] is None
