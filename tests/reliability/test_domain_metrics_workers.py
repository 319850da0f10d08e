"""The domain counters of /metrics add up across gunicorn workers: predictions
and outcomes answered by two API processes are all counted whichever process
answers the scrape (prometheus_client's multiprocess mode, its documented use
with gunicorn; the totals are our own contract)."""

from __future__ import annotations

import json
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from tests.reliability.harness import ADMIN
from tests.reliability.probes import ask, predicting_server

pytestmark = pytest.mark.slow
SENT = 60
QUERY = "vibration_rms=12.5&pump_family=screw&has_vfd=true&explain=none"


def total(base: str, name: str) -> float:
    text = ask(base, "GET", "/metrics").body.decode()
    return sum(sample.value for family in text_string_to_metric_families(text)
               for sample in family.samples if sample.name == name)


def test_domain_counters_add_up_across_two_workers(sqlite_url: str, tmp_path: Path) -> None:
    auth = {"Authorization": f"Bearer {ADMIN}"}
    with predicting_server(sqlite_url, tmp_path) as base:
        def predict(i: int) -> int:
            return ask(base, "GET", f"/v1/models/pump-risk/predictions?{QUERY}&key=c-{i}",
                       auth).status

        with ThreadPoolExecutor(8) as pool:
            assert set(pool.map(predict, range(SENT))) == {200}
        body = json.dumps({"outcomes": [{"key": f"c-{i}", "label": "ok"}
                                        for i in range(SENT)]}).encode()
        answer = ask(base, "POST", "/v1/models/pump-risk/outcomes",
                     {**auth, "Content-Type": "application/json",
                      "Content-Length": str(len(body))}, body)
        assert answer.status == 201, answer.body
        # Every scrape, whichever process answers it, sees all of them.
        for _ in range(4):
            assert total(base, "keelson_predictions_served_total") == SENT
            assert total(base, "keelson_outcomes_received_total") == SENT
