"""Probes of answer sizes: no answer grows far beyond the request that caused it.

Adversarial inputs against a model with a 300-level field and 300 classes: a
batch of bad records (each error once echoed the whole list of levels, so a
34 KB ingest drew a 102 MB 422), a huge unknown field name, long bad values
and keys, and large prediction batches with explanations (the baseline was
repeated in every record's answer: 2.2 MB asked, 95.7 MB answered). Every
error answer must stay under 1 MiB whatever the input, and every answer
within a bounded multiple of its request. SQLite and PostgreSQL.

``-s`` prints the figures (``answer size figures: {...}``) the README's
reliability table quotes.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import Any

import numpy as np
import pytest

from service.usecases.prediction_limits import ANSWER_BYTE_COST
from service.web.extensions import get_database
from service.web.schemas.spec import MAX_VALUE_LENGTH
from tests.service.conftest import build_app
from tests.service.helpers import ADMIN_TOKEN, ApiClient
from tests.service.predictions_factory import add_version, train_learner

MIB = 1024 * 1024
LEVELS = [f"station-{i:03d}" for i in range(300)]
CLASSES = [f"alarm-{i:03d}" for i in range(300)]
# An error answer names at most this many field paths (service/web/problems.py).
LISTED = 100
# How many times its request an answer may be, at most: a prediction answers
# a few numbers per feature of each record (its probabilities and
# attributions), never the model's levels again per record.
RATIO = 12
FIGURES: dict[str, Any] = {}


def station_spec(name: str, *, classes: list[str]) -> dict[str, Any]:
    return {"name": name, "task": "multiclass" if len(classes) > 2 else "binary",
            "target": "alarm", "classes": classes,
            "features": [{"name": "station", "type": "categorical", "levels": LEVELS},
                         {"name": "flow_lps", "type": "numeric", "min": 0, "max": 500},
                         {"name": "has_vfd", "type": "boolean"}]}


def station_rows(n: int, seed: int = 0) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed)
    return [{"station": LEVELS[int(rng.integers(300))], "flow_lps": float(rng.uniform(0, 500)),
             "has_vfd": bool(rng.integers(2))} for _ in range(n)]


def sent(api: ApiClient, method: str, path: str, body: Any, status: int) -> tuple[int, int]:
    """(request bytes, answer bytes) of one request answered ``status``."""
    data = json.dumps(body) if not isinstance(body, bytes) else body
    api.request(method, path, status, data=data, content_type="application/json")
    return len(data), len(api.last.data)


def error_answer(api: ApiClient, path: str, body: Any, what: str) -> dict[str, Any]:
    """The 422 of ``body`` at ``path``: under 1 MiB, its size kept in FIGURES."""
    asked, answered = sent(api, "POST", path, body, 422)
    FIGURES[what] = {"request_bytes": asked, "answer_bytes": answered}
    FIGURES["largest_error_answer_bytes"] = max(answered,
                                                FIGURES.get("largest_error_answer_bytes", 0))
    assert answered < MIB, (what, answered)
    problem: dict[str, Any] = json.loads(api.last.data)
    return problem


@pytest.fixture(scope="module", autouse=True)
def figures() -> Iterator[None]:
    yield
    print("\nanswer size figures:", json.dumps(FIGURES))


@pytest.fixture
def any_api(database_url: str) -> Iterator[ApiClient]:
    """A server whose operator raised the model size limits: the models here
    are beyond the defaults (300 levels, 1,000 long class names), and the
    answers must stay bounded all the same."""
    app = build_app(database_url, KEELSON_MAX_LEVELS=1000, KEELSON_MAX_CLASSES=1000,
                    KEELSON_MAX_SPEC_BYTES=1_000_000)
    yield ApiClient(app)
    get_database(app).engine.dispose()


@pytest.fixture
def stations(any_api: ApiClient) -> ApiClient:
    any_api.request("POST", "/v1/models", 201, json_body=station_spec("stations",
                                                                      classes=CLASSES))
    return any_api


def test_many_bad_records_list_the_first_paths_and_count_the_rest(stations: ApiClient) -> None:
    bad = {"features": {"station": "station-999", "flow_lps": 12.0, "has_vfd": True},
           "label": "alarm-999"}
    problem = error_answer(stations, "/v1/models/stations/records",
                           {"records": [bad] * 2000}, "2,000 bad records")
    assert len(problem["errors"]) == LISTED
    # Two bad fields per record: 4,000 paths, the first 100 listed.
    assert problem["errors_omitted"] == 2 * 2000 - LISTED
    assert "records.0.features.station" in problem["errors"]
    for messages in problem["errors"].values():
        for message in messages:
            assert "station-299" not in message and "alarm-299" not in message, message
            assert "GET /v1/models/{name}/schema" in message, message


def test_one_bad_record_answers_a_few_times_its_size(stations: ApiClient) -> None:
    bad = {"features": {"station": "station-999", "flow_lps": 12.0, "has_vfd": True},
           "label": "alarm-002"}
    problem = error_answer(stations, "/v1/models/stations/records", {"records": [bad]},
                           "one bad record")
    assert problem["errors"] == {"records.0.features.station": [
        "Unknown level 'station-999': not one of the 300 levels of this field; "
        "GET /v1/models/{name}/schema lists them."]}
    assert "errors_omitted" not in problem
    figures = FIGURES["one bad record"]
    assert figures["answer_bytes"] < RATIO * figures["request_bytes"]


def test_a_short_list_of_levels_is_still_named(any_api: ApiClient) -> None:
    spec = station_spec("few", classes=["ok", "failed"])
    spec["features"][0]["levels"] = ["north", "south"]
    any_api.request("POST", "/v1/models", 201, json_body=spec)
    bad = {"features": {"station": "east", "flow_lps": 12.0, "has_vfd": True}, "label": "ok"}
    problem = error_answer(any_api, "/v1/models/few/records", {"records": [bad]},
                           "one bad record, 2 levels")
    assert problem["errors"] == {"records.0.features.station": [
        "Unknown level 'east'; expected one of ['north', 'south']."]}


@pytest.mark.parametrize("where", ["unknown field name", "bad level", "key", "label"])
def test_a_huge_echoed_value_is_cut_short(stations: ApiClient, where: str) -> None:
    huge = "x" * (4 * MIB)
    record: dict[str, Any] = {"features": {"station": "station-001", "flow_lps": 1.0,
                                           "has_vfd": False}, "label": "alarm-001"}
    if where == "unknown field name":
        record["features"][huge] = 1.0
    elif where == "bad level":
        record["features"]["station"] = huge
    elif where == "key":
        record["key"] = huge
    else:
        record["label"] = huge
    problem = error_answer(stations, "/v1/models/stations/records", {"records": [record]},
                           f"4 MiB {where}")
    assert FIGURES[f"4 MiB {where}"]["answer_bytes"] < 4096
    assert len(problem["errors"]) == 1
    if where in ("bad level", "label"):  # the value's head, then its length
        (message,), = problem["errors"].values()
        assert f"'{'x' * 60}'... (4,194,304 characters): not one of the 300" in message


@pytest.mark.parametrize(("names", "length", "character"), [
    (150, 100_000, "x"),
    # JSON writes a control character in 6 bytes (\u0001): the dearest to echo.
    (2000, 1000, "\u0001"),
])
def test_many_long_unknown_field_names_stay_under_a_mebibyte(
        stations: ApiClient, names: int, length: int, character: str) -> None:
    # Up to 15 MB of names, each a field path of its own.
    features: dict[str, Any] = {"station": "station-001", "flow_lps": 1.0, "has_vfd": False}
    features.update({f"{i:04d}" + character * length: 1.0 for i in range(names)})
    problem = error_answer(stations, "/v1/models/stations/records",
                           {"records": [{"features": features, "label": "alarm-001"}]},
                           f"{names:,} unknown names of {length:,} {character!r}")
    assert len(problem["errors"]) == LISTED and problem["errors_omitted"] == names - LISTED
    assert all(len(path) <= MAX_VALUE_LENGTH for path in problem["errors"])


def test_bad_prediction_records_are_capped_too(stations: ApiClient) -> None:
    learner = train_learner(station_spec("stations", classes=CLASSES), station_rows(600),
                            lambda row: CLASSES[LEVELS.index(row["station"])], passes=1)
    add_version(stations.app, "stations", learner.to_bytes())
    records = [{"features": {"station": "x" * 10_000, "flow_lps": -1.0, "has_vfd": 3}}] * 1000
    problem = error_answer(stations, "/v1/models/stations/predictions",
                           {"records": records, "explain": "none"}, "1,000 bad predictions")
    assert len(problem["errors"]) == LISTED and problem["errors_omitted"] == 3000 - LISTED


@pytest.mark.parametrize("explain", ["integrated_gradients", "gradient", "shapley", "none"])
def test_a_large_prediction_batch_answers_a_bounded_multiple_of_its_size(
        any_api: ApiClient, explain: str) -> None:
    spec = station_spec("risk", classes=["ok", "failed"])
    any_api.request("POST", "/v1/models", 201, json_body=spec)
    learner = train_learner(spec, station_rows(600), lambda row: "failed"
                            if row["flow_lps"] > 250 else "ok", passes=1)
    add_version(any_api.app, "risk", learner.to_bytes())
    body = {"records": [{"features": row} for row in station_rows(1000, seed=1)],
            "explain": explain, "steps": 8}
    asked, answered = sent(any_api, "POST", "/v1/models/risk/predictions", body, 200)
    ratio = answered / asked
    FIGURES[f"1,000 predictions, {explain}"] = {
        "request_bytes": asked, "answer_bytes": answered, "ratio": round(ratio, 2)}
    assert ratio < RATIO, (asked, answered)
    assert len(json.loads(any_api.last.data)["results"]) == 1000


def test_an_answer_too_large_for_the_budget_is_refused_before_any_work(
        any_api: ApiClient) -> None:
    # 1,000 classes named with 200 characters each, one boolean feature: each
    # record's probabilities take some 220 KB, so 1,000 records of 33 bytes
    # each once drew a 224 MB answer. The answer's size counts in the budget.
    classes = [f"alarm-{i:03d}-" + "x" * 190 for i in range(1000)]
    spec = {"name": "wide", "task": "multiclass", "target": "alarm", "classes": classes,
            "features": [{"name": "has_vfd", "type": "boolean"}]}
    any_api.request("POST", "/v1/models", 201, json_body=spec)
    learner = train_learner(spec, [{"has_vfd": i % 2 == 0} for i in range(2000)],
                            lambda row: classes[0] if row["has_vfd"] else classes[1], passes=1)
    add_version(any_api.app, "wide", learner.to_bytes())
    records = {"records": [{"features": {"has_vfd": True}}] * 1000, "explain": "none"}
    problem = error_answer(any_api, "/v1/models/wide/predictions", records,
                           "1,000 records of a 1,000-class model")
    assert problem["type"] == "urn:keelson:problem:over-budget"
    assert problem["cost"] > problem["budget"] and "answer" in problem["detail"]
    # The most records the budget admits (found by halving; a refusal costs no
    # work) are answered within the bytes it pays for: 16 MB at the default
    # budget (service/usecases/prediction_limits.py).
    admitted, refused = 1, 1000
    while refused - admitted > 1:
        middle = (admitted + refused) // 2
        records["records"] = [{"features": {"has_vfd": True}}] * middle
        answer = any_api.client.post("/v1/models/wide/predictions", json=records,
                                     headers={"Authorization": f"Bearer {ADMIN_TOKEN}"})
        assert answer.status_code in (200, 422), answer.status_code
        admitted, refused = (middle, refused) if answer.status_code == 200 else (
            admitted, middle)
    records["records"] = [{"features": {"has_vfd": True}}] * admitted
    asked, answered = sent(any_api, "POST", "/v1/models/wide/predictions", records, 200)
    FIGURES["the most records of a 1,000-class model within budget"] = {
        "records": admitted, "request_bytes": asked, "answer_bytes": answered,
        "ratio": round(answered / asked)}
    assert admitted > 1 and answered <= problem["budget"] // ANSWER_BYTE_COST
