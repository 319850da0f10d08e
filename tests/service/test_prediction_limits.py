"""A prediction request's cost budget, its deadline, and stopping when the
client has gone (service/usecases/prediction_limits.py)."""

from __future__ import annotations

import socket

import pytest
from flask import Flask

from engine import Learner
from service.usecases.prediction_limits import (
    ANSWER_BYTE_COST,
    PASS_ROWS,
    UNIT_COST,
    ClientGoneError,
    PredictionLimits,
    request_cost,
)
from service.usecases.predictions import PredictionOptions, answer_bytes, find_model, predict
from service.web.disconnect import client_gone_probe, connection_closed
from service.web.extensions import get_database, get_version_cache
from tests.service.conftest import build_app
from tests.service.helpers import ApiClient, create_model
from tests.service.predictions_factory import add_version, pump_rows, pump_rule, train_learner

PATH = "/v1/models/pump-risk/predictions"
QUERY = "vibration_rms=4.1&pump_family=screw&has_vfd=true"
ROW = {"vibration_rms": 4.1, "pump_family": "screw", "has_vfd": True}
OVER_BUDGET = "urn:keelson:problem:over-budget"


def served(app: Flask, hidden: list[int] | None = None) -> ApiClient:
    return serving(app, hidden)[0]


def serving(app: Flask, hidden: list[int] | None = None) -> tuple[ApiClient, Learner]:
    api = ApiClient(app)
    created = create_model(api, **({"hidden_layers": hidden} if hidden else {}))
    if hidden and sum(hidden) > 1000:  # too big to train in a test: fresh weights serve
        learner = Learner.create(created, warmup=pump_rows(64))
    else:
        learner = train_learner(created, pump_rows(64), pump_rule, passes=1)
    add_version(app, "pump-risk", learner.to_bytes())
    return api, learner


def answer_cost(learner: Learner, records: int, explained: bool = True) -> int:
    """What the answer of ``records`` rows adds to a request's cost."""
    return ANSWER_BYTE_COST * answer_bytes(learner, records, explained)


def test_the_cost_counts_records_rows_and_network_size() -> None:
    # 20-32-16-1: 1,217 parameters and 49 units.
    size = 1217 + UNIT_COST * 49
    assert request_cost(1, "integrated_gradients", 64, 32, 1217, 49) == (64 + 3 + PASS_ROWS) * size
    assert request_cost(10, "smoothgrad", 64, 32, 1217, 49) == 10 * (32 + 2 + PASS_ROWS) * size
    assert request_cost(10, "gradient", 64, 32, 1217, 49) == 10 * (2 + PASS_ROWS) * size
    assert request_cost(10, "gradient_times_input", 9, 9, 1217, 49) == 10 * (2 + PASS_ROWS) * size
    assert request_cost(1000, "none", 64, 32, 1217, 49) == 1000 * size


def test_the_reported_costly_request_is_refused_before_any_work(sqlite_url: str) -> None:
    """1,000 records with steps=1024 on a 3 x 1024 model: about 2.5e12 units,
    some 300 times the default budget. Its 2.1 million parameters are beyond
    today's default size limit, so this server allows more."""
    app = build_app(sqlite_url, KEELSON_MAX_PARAMETERS=3_000_000)
    api, learner = serving(app, hidden=[1024, 1024, 1024])
    body = api.request("POST", PATH, 422, json_body={
        "records": [{"features": ROW}] * 1000, "steps": 1024})
    assert body["type"] == OVER_BUDGET
    assert body["budget"] == app.config["KEELSON_PREDICTION_BUDGET"] == 8_000_000_000
    # 4 inputs (a number, a categorical field of 2 levels, a boolean), 3 x 1024, 1 output.
    parameters = (4 + 1) * 1024 + 2 * (1024 + 1) * 1024 + (1024 + 1) * 1
    units = 3 * 1024 + 1
    assert body["cost"] == 1000 * (1024 + 3 + PASS_ROWS) * (parameters + UNIT_COST * units) \
        + answer_cost(learner, 1000)
    assert "8,000,000,000" in body["detail"] and f"{body['cost']:,}" in body["detail"]
    # One record of it fits (it takes well under the 2 s the budget allows).
    api.request("POST", PATH, 200, json_body={"records": [{"features": ROW}],
                                              "steps": 1024})
    get_database(app).engine.dispose()


def test_the_budget_is_a_setting_and_every_method_is_counted(sqlite_url: str) -> None:
    budget = 600_000
    app = build_app(sqlite_url, KEELSON_PREDICTION_BUDGET=budget)
    api, learner = serving(app)
    # The pump model: 4 inputs, 32-16 hidden, 1 output: 705 parameters, 49 units.
    size = (4 + 1) * 32 + (32 + 1) * 16 + (16 + 1) * 1 + UNIT_COST * 49
    one = answer_cost(learner, 1)
    assert (2 + PASS_ROWS) * size + one < budget < (64 + 3 + PASS_ROWS) * size + one
    api.request("GET", f"{PATH}?{QUERY}&explain=gradient", 200)
    body = api.request("GET", f"{PATH}?{QUERY}", 422)  # integrated gradients, 64 steps
    assert (body["budget"], body["cost"]) == (budget, (64 + 3 + PASS_ROWS) * size + one)
    assert (8 + 2 + PASS_ROWS) * size + one < budget < (32 + 2 + PASS_ROWS) * size + one
    api.request("GET", f"{PATH}?{QUERY}&explain=smoothgrad&samples=8", 200)
    api.request("GET", f"{PATH}?{QUERY}&explain=smoothgrad&samples=32", 422)
    # Without explanations: each record's answer, a few hundred bytes, costs
    # more than its one row of computation.
    assert 3 * size + answer_cost(learner, 3, False) < budget
    assert 3 * (2 + PASS_ROWS) * size + answer_cost(learner, 3) > budget
    api.request("POST", PATH, 200, json_body={"records": [{"features": ROW}] * 3,
                                              "explain": "none"})
    api.request("POST", PATH, 422, json_body={"records": [{"features": ROW}] * 3,
                                              "explain": "gradient"})
    get_database(app).engine.dispose()


def test_a_request_past_its_deadline_answers_503_between_records(sqlite_url: str) -> None:
    # A deadline no request can meet: the check after the first record fires.
    app = build_app(sqlite_url, KEELSON_PREDICTION_DEADLINE_SECONDS=1e-9)
    api = served(app)
    body = api.request("POST", PATH, 503, json_body={"records": [{"features": ROW}] * 3})
    assert body["type"] == "urn:keelson:problem:deadline-exceeded"
    assert "1 of 3 records done" in body["detail"]
    assert api.last.headers["Retry-After"] == "1"
    get_database(app).engine.dispose()


def test_work_stops_between_records_once_the_client_is_gone(sqlite_url: str) -> None:
    app = build_app(sqlite_url)
    served(app)
    asked: list[int] = []

    def gone() -> bool:
        asked.append(1)
        return len(asked) >= 2  # still there after the first record, gone after the second

    with app.app_context():
        cache = get_version_cache(app)
        entry = find_model(cache, "pump-risk")
        limits = PredictionLimits(budget=10**12, deadline_seconds=60, client_gone=gone)
        with pytest.raises(ClientGoneError, match="after 2 of 5 records"):
            # PEEK_SECONDS spaces the looks in time; look at every record here.
            import service.usecases.prediction_limits as module
            module.PEEK_SECONDS, saved = 0.0, module.PEEK_SECONDS
            try:
                predict(cache, entry, [ROW] * 5, PredictionOptions(), limits)
            finally:
                module.PEEK_SECONDS = saved
    assert len(asked) == 2
    get_database(app).engine.dispose()


def test_a_closed_connection_is_told_from_an_open_one() -> None:
    """recv(2) with MSG_PEEK | MSG_DONTWAIT: EAGAIN while the peer is connected
    and silent, data when it sent more, 0 (end of file) once it closed (POSIX;
    Linux man page recv(2))."""
    ours, theirs = socket.socketpair()
    try:
        assert not connection_closed(ours)
        theirs.sendall(b"GET / HTTP/1.1\r\n")  # a next request: still there
        assert not connection_closed(ours)
        assert ours.recv(64)  # (peeking consumed nothing)
        theirs.close()
        assert connection_closed(ours)
    finally:
        ours.close()
    assert client_gone_probe({}) is None
    assert client_gone_probe({"gunicorn.socket": "not a socket"}) is None
