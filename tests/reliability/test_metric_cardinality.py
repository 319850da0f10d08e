"""Metric label cardinality against a real ``keelson serve``.

Held: whatever methods, paths and malformed requests clients send, every
label of every ``keelson_*`` series takes its value from a closed set (method:
RFC 9110 section 9's methods and PATCH, else ``OTHER``; route: a route
template or ``<unmatched>``; status: a three-digit code), so ``/metrics``
stops growing: 200 random methods made it grow from 52 KB to 395 KB. Metric
text parsed with prometheus_client's own parser (reference library).
"""

from __future__ import annotations

import json
import random
import re
import shutil
import string
from collections.abc import Iterator
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from service.usecases.predictions import EXPLAIN_METHODS
from service.web.app import create_app
from service.web.extensions import get_database
from service.web.observability import KNOWN_METHODS, OTHER_METHOD
from tests.reliability.harness import ADMIN
from tests.reliability.probes import RawHttp, ask, predicting_server

pytestmark = pytest.mark.slow
def route_templates(database_url: str) -> set[str]:
    """Every route template of the app, and the label of a path none matches."""
    app = create_app({"KEELSON_DATABASE_URL": database_url})
    try:
        return {rule.rule for rule in app.url_map.iter_rules()} | {"<unmatched>"}
    finally:
        get_database(app).engine.dispose()


@pytest.fixture(scope="module")
def served(sqlite_template: Path, tmp_path_factory: pytest.TempPathFactory
           ) -> Iterator[tuple[str, set[str]]]:
    """(base URL, the app's route templates)."""
    folder = tmp_path_factory.mktemp("metrics")
    shutil.copyfile(sqlite_template, folder / "keelson.db")
    url = f"sqlite:///{folder / 'keelson.db'}"
    with predicting_server(url, folder) as base:
        yield base, route_templates(url)


def scrape(base: str) -> str:
    answer = ask(base, "GET", "/metrics")
    assert answer.status == 200
    return answer.body.decode()


def labels(text: str) -> dict[str, set[str]]:
    seen: dict[str, set[str]] = {}
    for family in text_string_to_metric_families(text):
        if not family.name.startswith("keelson_"):
            continue
        for sample in family.samples:
            for name, value in sample.labels.items():
                seen.setdefault(name, set()).add(value)
    return seen


def hostile_traffic(base: str, rng: random.Random, count: int) -> None:
    auth = {"Authorization": f"Bearer {ADMIN}"}
    for _ in range(count):
        method = "".join(rng.choices(string.ascii_uppercase, k=rng.randint(3, 12)))
        path = "/" + "/".join("".join(rng.choices(string.ascii_lowercase + "-%2F", k=6))
                              for _ in range(rng.randint(1, 4)))
        for m, p in ((method, "/healthz"), (method, "/v1/models/pump-risk"), ("GET", path),
                     (method, path)):
            assert ask(base, m, p, auth).status < 500
        # and a malformed one, answered by the transport itself
        connection = RawHttp(base)
        connection.send(f"{method.lower()} /{path} HTTP/1.1\r\n\r\n".encode())
        assert connection.answer().status == 400
        connection.close()


def test_metric_labels_come_from_closed_sets_whatever_clients_send(
        served: tuple[str, set[str]]) -> None:
    base, routes = served
    hostile_traffic(base, random.Random(6), 20)
    scrape(base)  # every kind of series exists now, the scrape's own included
    before = scrape(base)
    hostile_traffic(base, random.Random(7), 200)
    after = scrape(base)
    seen = labels(after)
    print("metric cardinality figures:", json.dumps({
        "hostile_requests": 200 * 5, "metrics_bytes_before": len(before),
        "metrics_bytes_after": len(after),
        "label_values": {name: len(values) for name, values in sorted(seen.items())}}))
    assert seen["method"] <= KNOWN_METHODS | {OTHER_METHOD}, seen["method"]
    assert OTHER_METHOD in seen["method"]
    assert seen["route"] <= routes, seen["route"] - routes
    assert all(re.fullmatch(r"[1-5]\d\d", status) for status in seen["status"])
    # The domain series are labelled by the stored models, their versions'
    # numbers, the explanation methods and the live metric names only, never
    # by what a client sent.
    assert set(seen) <= {"method", "route", "status", "le", "model", "version", "explain",
                         "metric"}, set(seen)
    assert seen.get("model", set()) <= {"pump-risk"}, seen.get("model")
    assert seen.get("explain", set()) <= set(EXPLAIN_METHODS), seen.get("explain")
    assert all(v.isdigit() for v in seen.get("version", set())), seen.get("version")
    assert seen.get("metric", set()) <= {"log_loss", "rmse"}
    # The same series, only their counts moved: the text is (nearly) the same size.
    assert len(after) <= len(before) * 1.05 + 512, (len(before), len(after))
