"""POST /v1/models/{name}/outcomes: docs/http-api.md, "Outcomes".

An accepted outcome becomes a labelled record through the records' own code
(split, order, exactly once) and is joined with the score served for its case;
a refused batch changes no row."""

from __future__ import annotations

from typing import Any

import pytest
from sqlalchemy import select

import service.usecases.outcomes as outcomes_module
from service.store.tables import RecordRow, ScoredCaseRow, VersionRow
from service.usecases.common import as_utc
from service.usecases.records import split_of
from service.usecases.track_record import JoinedOutcome
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, model_row
from tests.service.outcome_helpers import (
    FLOW_OUTCOMES,
    OUTCOMES,
    flow_model,
    scored_pumps,
    stored_state,
)
from tests.service.predictions_factory import pump_rows


def test_an_outcome_becomes_a_labelled_record_of_its_case(any_api: ApiClient) -> None:
    scored_pumps(any_api, 3)
    body = any_api.request("POST", OUTCOMES, 201, json_body={"outcomes": [
        {"key": "st-2", "label": "failed"}, {"key": "st-0", "label": "ok"}]})
    assert body == {"accepted": 2, "duplicates": 0}
    rows = pump_rows(3, seed=7)
    model = model_row(any_api.app, "pump-risk")
    fraction = model.spec["training"]["holdout_fraction"]
    with get_database(any_api.app).read() as session:
        records = session.execute(select(RecordRow.seq, RecordRow.key, RecordRow.features,
                                         RecordRow.label, RecordRow.split)
                                  .order_by(RecordRow.seq)).all()
        cases = {c.key: c for c in session.scalars(select(ScoredCaseRow))}
    assert [(r.key, r.features, r.label) for r in records] == [
        ("st-2", rows[2], "failed"), ("st-0", rows[0], "ok")]
    assert [r.split for r in records] == [split_of(model.id, r.key, r.seq, fraction)
                                          for r in records]
    assert model.records_train + model.records_holdout == 2
    assert (cases["st-2"].outcome, cases["st-0"].outcome, cases["st-1"].outcome) == (
        "failed", "ok", None)
    assert cases["st-1"].outcome_at is None and cases["st-0"].outcome_at is not None


def test_each_accepted_outcome_is_joined_with_its_served_score(
        any_api: ApiClient, monkeypatch: pytest.MonkeyPatch) -> None:
    results = scored_pumps(any_api, 2)
    seen: list[JoinedOutcome] = []
    monkeypatch.setattr(outcomes_module, "record_outcomes",
                        lambda session, model, joined: seen.extend(joined))
    any_api.request("POST", OUTCOMES, 201, json_body={"outcomes": [
        {"key": "st-1", "label": "failed"}]})
    with get_database(any_api.app).read() as session:
        version_id = session.scalar(select(VersionRow.id))
        case = session.scalars(select(ScoredCaseRow).where(ScoredCaseRow.key == "st-1")).one()
    (joined,) = seen
    assert (joined.version_id, joined.output, joined.label) == (
        version_id, results[1]["result"]["probabilities"], "failed")
    assert (joined.scored_at, joined.outcome_at) == (as_utc(case.scored_at),
                                                     as_utc(case.outcome_at))


def test_the_join_is_in_the_same_transaction(any_api: ApiClient,
                                             monkeypatch: pytest.MonkeyPatch) -> None:
    scored_pumps(any_api, 2)
    before = stored_state(any_api.app)

    def fails(session: Any, model: Any, joined: Any) -> None:
        raise RuntimeError("the track record could not be written")

    monkeypatch.setattr(outcomes_module, "record_outcomes", fails)
    any_api.app.config["PROPAGATE_EXCEPTIONS"] = False
    any_api.request("POST", OUTCOMES, 500, json_body={"outcomes": [
        {"key": "st-1", "label": "failed"}]})
    assert stored_state(any_api.app) == before


def test_the_same_outcome_again_is_a_duplicate(any_api: ApiClient) -> None:
    scored_pumps(any_api, 2)
    any_api.request("POST", OUTCOMES, 201, json_body={"outcomes": [
        {"key": "st-0", "label": "ok"}]})
    state = stored_state(any_api.app)
    body = any_api.request("POST", OUTCOMES, 201, json_body={"outcomes": [
        {"key": "st-0", "label": "ok"}, {"key": "st-1", "label": "failed"},
        {"key": "st-1", "label": "failed"}]})
    assert body == {"accepted": 1, "duplicates": 2}
    records, _, _ = stored_state(any_api.app)
    assert [r.key for r in records] == [r.key for r in state[0]] + ["st-1"]


def test_another_label_for_a_known_outcome_is_a_409(any_api: ApiClient) -> None:
    scored_pumps(any_api, 3)
    any_api.request("POST", OUTCOMES, 201, json_body={"outcomes": [
        {"key": "st-0", "label": "ok"}]})
    before = stored_state(any_api.app)
    problem = any_api.request("POST", OUTCOMES, 409, json_body={"outcomes": [
        {"key": "st-2", "label": "ok"}, {"key": "st-0", "label": "failed"},
        {"key": "st-1", "label": "ok"}, {"key": "st-1", "label": "failed"}]})
    assert problem["type"] == "urn:keelson:problem:outcome-conflict"
    assert problem["errors"] == {
        "outcomes.1.label": ["Case 'st-0' already has the outcome 'ok'."],
        "outcomes.3.label": ["Case 'st-1' already has the outcome 'ok'."]}
    assert stored_state(any_api.app) == before


def test_unknown_keys_are_a_422_naming_each(any_api: ApiClient) -> None:
    scored_pumps(any_api, 1)
    before = stored_state(any_api.app)
    problem = any_api.request("POST", OUTCOMES, 422, json_body={"outcomes": [
        {"key": "nope-1", "label": "ok"}, {"key": "st-0", "label": "ok"},
        {"key": "nope-2", "label": "failed"}]})
    assert problem["type"] == "urn:keelson:problem:unknown-case"
    assert problem["errors"] == {"outcomes.0.key": ["No case was scored with this key."],
                                 "outcomes.2.key": ["No case was scored with this key."]}
    assert "'nope-1'" in problem["detail"] and "'nope-2'" in problem["detail"]
    assert stored_state(any_api.app) == before


@pytest.mark.parametrize(("body", "content_type", "status", "path"), [
    ('{"outcomes": [{"key": "f-0", "label": NaN}]}', "application/json", 422,
     "outcomes.0.label"),
    ('{"outcomes": [{"key": "f-0", "label": 1e999}]}', "application/json", 422,
     "outcomes.0.label"),
    ('{"outcomes": [{"key": "f-0", "label": "3"}]}', "application/json", 422,
     "outcomes.0.label"),
    ('{"outcomes": [{"key": "f-0"}]}', "application/json", 422, "outcomes.0.label"),
    ('{"outcomes": [{"key": "f-0", "label": 3, "extra": 1}]}', "application/json", 422,
     "outcomes.0.extra"),
    ('{"outcomes": []}', "application/json", 422, "outcomes"),
    ('{"records": []}', "application/json", 422, "records"),
    ("key,label\r\nf-0,nan\r\n", "text/csv", 422, "outcomes.0.label"),
    ("key,label\r\nf-0,-inf\r\n", "text/csv", 422, "outcomes.0.label"),
    ("key,label\r\nf-0,Infinity\r\n", "text/csv", 422, "outcomes.0.label"),
    ("key,label,a\r\nf-0,1,2\r\n", "text/csv", 422, "columns.a"),
    ("key\r\nf-0\r\n", "text/csv", 422, "columns.label"),
    ("key,label\r\nf-0\r\n", "text/csv", 422, "outcomes.0"),
    ('key,label\r\n"f-0,1\r\n', "text/csv", 400, None),
    ("key,label\r\n", "text/csv", 422, "outcomes"),
    ("f-0 1", "text/plain", 415, None),
])
def test_bad_outcomes_are_refused_and_change_nothing(
        api: ApiClient, body: str, content_type: str, status: int, path: str | None) -> None:
    flow_model(api)
    before = stored_state(api.app)
    problem = api.request("POST", FLOW_OUTCOMES, status, data=body,
                          content_type=content_type)
    if path is not None:
        assert path in problem["errors"], problem
    assert stored_state(api.app) == before


def test_regression_outcomes_by_csv(any_api: ApiClient) -> None:
    flow_model(any_api)
    body = any_api.request("POST", FLOW_OUTCOMES, 201, data="\ufefflabel,key\r\n-2.5,f-0\r\n",
                           content_type="text/csv")
    assert body == {"accepted": 1, "duplicates": 0}
    records, cases, _ = stored_state(any_api.app)
    assert [(r.key, r.label) for r in records] == [("f-0", -2.5)]
    assert cases[0].outcome == -2.5


def test_classification_outcomes_by_csv(api: ApiClient) -> None:
    scored_pumps(api, 3)
    body = api.request("POST", OUTCOMES, 201, data="key,label\r\nst-0,failed\r\nst-1,ok\r\n",
                       content_type="text/csv; charset=utf-8")
    assert body == {"accepted": 2, "duplicates": 0}
    problem = api.request("POST", OUTCOMES, 422, data="key,label\r\nst-2,broken\r\n",
                          content_type="text/csv")
    assert "outcomes.0.label" in problem["errors"]


def test_more_outcomes_than_the_limit_is_413(sqlite_url: str) -> None:
    from tests.service.conftest import build_app
    api = ApiClient(build_app(sqlite_url, KEELSON_MAX_RECORDS_PER_REQUEST=2))
    scored_pumps(api, 3)
    before = stored_state(api.app)
    outcomes = [{"key": f"st-{i}", "label": "ok"} for i in range(3)]
    api.request("POST", OUTCOMES, 413, json_body={"outcomes": outcomes})
    csv = "key,label\r\n" + "".join(f"st-{i},ok\r\n" for i in range(3))
    api.request("POST", OUTCOMES, 413, data=csv, content_type="text/csv")
    assert stored_state(api.app) == before


def test_outcomes_need_the_ingest_scope(api: ApiClient) -> None:
    scored_pumps(api, 1)
    body = {"outcomes": [{"key": "st-0", "label": "ok"}]}
    api.request("POST", OUTCOMES, 403, token=api.token("predict"), json_body=body)
    api.request("POST", OUTCOMES, 201, token=api.token("ingest"), json_body=body)
    api.request("POST", "/v1/models/nothing/outcomes", 404, json_body=body)
