"""Probes that keep four classes of defect covered on real servers:

- cost budgets: a prediction request over its budget is refused before any
  work (422 stating the budget and the cost); one within budget that runs
  past its deadline answers 503 between records; one whose client leaves
  stops between records (gunicorn, the client's socket peeked);
- output overflow: valid inputs whose output leaves float64 answer 422 naming
  the fields, never 500;
- one model's damaged data: a model whose stored spec does not decode is
  backed off alone while the others reach zero lag (keelson serve, worker);
- a model without warm-up (``warmup_records: 0``) trains.

The worker-level cases of each are in tests/worker/test_isolation.py,
tests/worker/test_no_warmup.py and tests/service/test_prediction_limits.py.
"""

from __future__ import annotations

import json
import socket
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from flask import Flask
from sqlalchemy import text

from engine import Learner
from service.web.app import create_app
from service.web.extensions import get_database
from tests.reliability.harness import ADMIN, Client, api_server, wait_for
from tests.service.helpers import ApiClient
from tests.service.predictions_factory import add_version, train_learner

pytestmark = pytest.mark.slow
FIELDS = ["level", "head"]
ROW = {"level": 2.0, "head": 1.0}


def spec(name: str, **changes: Any) -> dict[str, Any]:
    return {"name": name, "task": "regression", "target": "flow", "activation": "relu",
            "features": [{"name": f, "type": "numeric"} for f in FIELDS], **changes}


def rows(n: int, seed: int = 0) -> list[dict[str, float]]:
    rng = np.random.default_rng(seed)
    return [{"level": float(a), "head": float(b)} for a, b in rng.uniform(0, 8, size=(n, 2))]


def flow(row: dict[str, float]) -> float:
    return 2.0 * row["level"] + 3.0 * row["head"]  # 2 x 1e308 is beyond float64


@pytest.fixture
def store(sqlite_url: str) -> Iterator[Flask]:
    """An app on the database the server uses, to store versions directly."""
    app = create_app({"KEELSON_DATABASE_URL": sqlite_url})
    yield app
    get_database(app).engine.dispose()


def serve_fresh(client: Client, store: Flask, name: str, hidden: list[int]) -> None:
    created = client.request("POST", "/v1/models", spec(name, hidden_layers=hidden))[1]
    add_version(store, name, Learner.create(created, warmup=rows(64)).to_bytes())


def raw_post(port: int, path: str, body: dict[str, Any]) -> socket.socket:
    """Send a request on a socket of our own and return it unread."""
    data = json.dumps(body).encode()
    head = (f"POST {path} HTTP/1.1\r\nHost: 127.0.0.1\r\nAuthorization: Bearer {ADMIN}\r\n"
            f"Content-Type: application/json\r\nContent-Length: {len(data)}\r\n\r\n").encode()
    sock = socket.create_connection(("127.0.0.1", port))
    sock.sendall(head + data)
    return sock


def test_costly_predictions_are_refused_cut_short_or_dropped(
    sqlite_url: str, tmp_path: Path, store: Flask,
) -> None:
    # A generous budget so that a long request gets through; a short deadline;
    # room for the reported 3 x 1024 network (2.1 million parameters).
    settings = {"KEELSON_PREDICTION_BUDGET": str(10**12), "KEELSON_MAX_PARAMETERS": "3000000",
                "KEELSON_PREDICTION_DEADLINE_SECONDS": "1.5"}
    with api_server(sqlite_url, tmp_path, workers=1, **settings) as (base, _process):
        client = Client(base)
        serve_fresh(client, store, "huge", [1024, 1024, 1024])
        serve_fresh(client, store, "wide", [256, 256])
        # The reported request: 1,000 records, steps=1024, a 3 x 1024 network.
        many = {"records": [{"features": ROW}] * 1000, "steps": 1024}
        figures: dict[str, Any] = {}
        began = time.monotonic()
        status, body, _ = client.request("POST", "/v1/models/huge/predictions", many)
        figures["refused_in_s"] = round(time.monotonic() - began, 3)
        figures["cost_over_budget"] = body.get("cost", 0) / 10**12
        assert status == 422 and body["type"] == "urn:keelson:problem:over-budget"
        assert body["budget"] == 10**12 < body["cost"]
        assert f"{body['budget']:,}" in body["detail"] and f"{body['cost']:,}" in body["detail"]

        # Within budget (about 12 ms a record here), past the deadline.
        began = time.monotonic()
        status, body, headers = client.request("POST", "/v1/models/wide/predictions", many)
        figures["deadline_answer_in_s"] = round(time.monotonic() - began, 3)
        figures["deadline_detail"] = body.get("detail")
        assert status == 503 and body["type"] == "urn:keelson:problem:deadline-exceeded"
        assert headers["retry-after"] == "1" and "of 1,000 records done" in body["detail"]

        # The same request from a client that leaves at once: the work stops.
        port = int(base.rsplit(":", 1)[1])
        raw_post(port, "/v1/models/wide/predictions", many).close()
        log = tmp_path / "api.log"
        line = wait_for(lambda: next((entry for entry in log.read_text().splitlines()
                                      if "client closed the connection" in entry), None))
        done = int(line.split(" after ")[1].split(" of ")[0])
        assert 1 <= done < 1000
        figures["records_done_when_the_client_left"] = done
        print(f"probe figures: {json.dumps(figures)}")
        # The process is free again for the next request.
        status, body, _ = client.request(
            "GET", "/v1/models/wide/predictions?level=2&head=1&explain=gradient")
        assert status == 200 and body["explanation"]["method"] == "gradient"


def test_an_output_that_overflows_answers_422_naming_the_fields(
    sqlite_url: str, tmp_path: Path, store: Flask,
) -> None:
    with api_server(sqlite_url, tmp_path, workers=1) as (base, _process):
        client = Client(base)
        created = client.request("POST", "/v1/models", spec("unbounded", hidden_layers=[16, 16]))[1]
        add_version(store, "unbounded", train_learner(created, rows(200), flow).to_bytes())
        for explain in ("none", "gradient", "integrated_gradients", "smoothgrad"):
            status, body, _ = client.request(
                "GET", f"/v1/models/unbounded/predictions?level=1e308&head=1e308&explain={explain}")
            assert status == 422, (explain, body)
            assert body["type"] == "urn:keelson:problem:output-overflow"
            assert "overflows" in body["detail"] and "level" in body["errors"]


def test_a_damaged_model_is_backed_off_and_a_model_without_warm_up_trains(
    database_url: str, tmp_path: Path,
) -> None:
    # The models are made, and one damaged, before any worker runs: a lineage
    # already running keeps the spec it read (specs never change).
    app = create_app({"KEELSON_DATABASE_URL": database_url, "KEELSON_ADMIN_TOKEN": ADMIN})
    api = ApiClient(app)
    api.request("POST", "/v1/models", 201, json_body=spec("damaged"), token=ADMIN)
    api.request("POST", "/v1/models", 201, json_body=spec("healthy"), token=ADMIN)
    api.request("POST", "/v1/models", 201, token=ADMIN,
                json_body=spec("no-warmup", training={"warmup_records": 0}))
    # A lone surrogate escape in the stored spec: valid to the API's JSON
    # reader, not to the worker's (the reported defect).
    stored = api.request("GET", "/v1/models/damaged", 200, token=ADMIN)
    damaged = {key: stored[key] for key in ("name", "task", "target", "features",
                                            "hidden_layers", "activation", "training")}
    damaged["target"] = "\ud800"
    engine = get_database(app).engine
    cast = "CAST(:spec AS JSON)" if engine.dialect.name == "postgresql" else ":spec"
    with engine.begin() as connection:
        connection.execute(text(f"UPDATE models SET spec = {cast} WHERE name = 'damaged'"),
                           {"spec": json.dumps(damaged)})
    engine.dispose()

    settings = {"KEELSON_WORKER_RETRY_SECONDS": "0.2", "KEELSON_WORKER_RETRY_MAX_SECONDS": "1"}
    with api_server(database_url, tmp_path, workers=1, with_worker=True, **settings) as (
            base, _process):
        client = Client(base)
        records = [{"features": row, "label": flow(row)} for row in rows(300, seed=1)]
        for name in ("damaged", "healthy", "no-warmup"):
            assert client.request("POST", f"/v1/models/{name}/records",
                                  {"records": records})[0] == 201

        def model(name: str) -> dict[str, Any]:
            status, body, _ = client.request("GET", f"/v1/models/{name}")
            assert status == 200, body
            return dict(body)

        wait_for(lambda: model("healthy")["trainer"]["lag"] == 0, timeout=60)
        wait_for(lambda: model("no-warmup")["active_version"] is not None, timeout=60)
        trainer = wait_for(lambda: (t := model("damaged")["trainer"]).get("error") and t,
                           timeout=60)
    assert trainer["error"].startswith("the model's stored spec cannot be read")
    assert trainer["retry_at"] and trainer["lag"] == 300
