"""POST /v1/models/{name}/records/forget: records, scored cases and outcomes
go in one transaction; the versions trained on them are marked and the active
one keeps serving; the history says so with the keys hashed; a repeat changes
nothing; a refused request changes no row. Common practice, no source."""

from __future__ import annotations

import hashlib
from typing import Any

from flask import Flask
from sqlalchemy import select, update

from service.store.tables import (
    JobRow,
    ModelRow,
    RecordRow,
    ScoredCaseRow,
    TrackRecordDayRow,
    TrainerRow,
    VersionRow,
)
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, add_version, create_model, ingest_raw, record
from tests.service.outcome_helpers import OUTCOMES, scored_pumps
from tests.service.test_token_models import everything

FORGET = "/v1/models/pump-risk/records/forget"


def stored(app: Flask) -> list[tuple[int, str, str]]:
    """(seq, key, split) of every record, in sequence order."""
    with get_database(app).read() as session:
        return [tuple(row) for row in session.execute(  # type: ignore[misc]
            select(RecordRow.seq, RecordRow.key, RecordRow.split).order_by(RecordRow.seq))]


def versions(api: ApiClient) -> dict[int, dict[str, Any]]:
    page = api.request("GET", "/v1/models/pump-risk/versions", 200)["versions"]
    return {v["number"]: v for v in page}


def keyed_model(api: ApiClient, n: int = 40) -> list[tuple[int, str, str]]:
    create_model(api)
    ingest_raw(get_database(api.app).write, "pump-risk",
               [record(i, key=f"pump-{i}") for i in range(n)])
    return stored(api.app)


def set_cursor(app: Flask, number: int, cursor: int) -> None:
    with get_database(app).write() as session:
        session.execute(update(VersionRow).where(VersionRow.number == number)
                        .values(cursor=cursor))
        session.commit()


def test_records_that_trained_the_active_version_mark_it_and_it_keeps_serving(
        any_api: ApiClient) -> None:
    rows = keyed_model(any_api)
    train = [row for row in rows if row[2] == "train"]
    holdout = [row for row in rows if row[2] == "holdout"]
    assert len(train) > 12 and holdout  # the split by key gives both
    # v1 (retired) read up to the 5th train record, v2 (active) up to the
    # 10th, v3 (candidate, v2's child) everything.
    add_version(any_api.app, "pump-risk", 1, status="retired", cursor=train[4][0])
    add_version(any_api.app, "pump-risk", 2, status="active", cursor=train[9][0],
                parent=1, active=True)
    add_version(any_api.app, "pump-risk", 3, cursor=rows[-1][0], parent=2)
    # Forget the 3rd and 8th train records, the 12th, a holdout one and a key never stored.
    keys = [train[2][1], train[7][1], train[11][1], holdout[0][1], "pump-never"]
    answer = any_api.request("POST", FORGET, 200, json_body={
        "keys": keys, "reason": "customer asked"})
    assert (answer["keys"], answer["forgotten"], answer["absent"]) == (5, 4, 1)
    assert answer["absent_keys"] == ["pump-never"]
    assert answer["removed"] == {"records": 4, "train": 3, "holdout": 1, "cases": 0,
                                 "outcomes": 0, "track_record_outcomes": 0}
    marked = {(v["number"], v["records"]) for v in answer["versions_marked"]}
    assert marked == {(1, 1), (2, 2), (3, 3)}
    assert answer["active"] == {"version": 2, "records": 2}
    assert answer["message"].startswith(
        "Version 2, active, was trained on 2 of these records and keeps serving until "
        "another version is promoted.")
    assert answer["retrain"] is None
    shown = versions(any_api)
    assert {n: v["forgotten_records"] for n, v in shown.items()} == {1: 1, 2: 2, 3: 3}
    assert any_api.request("GET", "/v1/models/pump-risk/versions/2", 200)[
        "forgotten_records"] == 2
    assert [row for row in stored(any_api.app) if row[1] in keys] == []
    model = any_api.request("GET", "/v1/models/pump-risk", 200)
    assert model["active_version"] == 2
    assert model["records"] == {"total": len(rows) - 4, "train": len(train) - 3,
                                "holdout": len(holdout) - 1}
    event = any_api.request("GET", "/v1/models/pump-risk/history", 200)["events"][-1]
    assert event["kind"] == "records_forgotten" and event["reason"] == "customer asked"
    assert event["id"] == answer["event"] and event["at_seq"] == rows[-1][0]
    assert event["details"]["keys_sha256"] == sorted(
        hashlib.sha256(key.encode()).hexdigest() for key in keys[:4])
    assert "pump-" not in str(event["details"])  # no key in clear
    assert event["details"]["message"] == answer["message"]
    assert event["details"]["versions_marked"] == 3


def test_a_version_written_later_inherits_its_parents_mark(any_api: ApiClient) -> None:
    from service.versions.writes import NewVersion, insert_version
    rows = keyed_model(any_api)
    add_version(any_api.app, "pump-risk", 1, cursor=rows[-1][0])
    any_api.request("POST", FORGET, 200, json_body={"keys": [rows[0][1], rows[1][1]]})
    learned = sum(row[2] == "train" for row in rows[:2])
    with get_database(any_api.app).write() as session:
        model_id = session.scalars(select(ModelRow.id)).one()
        parent = session.scalars(select(VersionRow.id).where(VersionRow.number == 1)).one()
        child = insert_version(session, model_id, NewVersion(
            snapshot=b"-", origin="online", cursor=rows[-1][0], records_seen=0, metrics={},
            parent_id=parent))
        scratch = insert_version(session, model_id, NewVersion(
            snapshot=b"-", origin="retrain", cursor=rows[-1][0], records_seen=0, metrics={},
            parent_id=None))
        assert (child.forgotten_records, scratch.forgotten_records) == (learned, 0)
        session.rollback()


def test_forgetting_keyed_outcomes_removes_case_outcome_record_and_their_sums(
        any_api: ApiClient) -> None:
    scored_pumps(any_api, 6)
    any_api.request("POST", OUTCOMES, 201, json_body={"outcomes": [
        {"key": f"st-{i}", "label": "failed" if i % 2 else "ok"} for i in range(4)]})

    def day_sums() -> list[tuple[int, int]]:
        with get_database(any_api.app).read() as session:
            return [tuple(r) for r in session.execute(  # type: ignore[misc]
                select(TrackRecordDayRow.n, TrackRecordDayRow.correct))]

    before = any_api.request("GET", "/v1/models/pump-risk/track-record", 200)
    assert day_sums()[0][0] == 4
    answer = any_api.request("POST", FORGET, 200, json_body={"keys": ["st-0", "st-1", "st-5"]})
    assert answer["removed"] == {"records": 2, "train": answer["removed"]["train"],
                                 "holdout": answer["removed"]["holdout"], "cases": 3,
                                 "outcomes": 2, "track_record_outcomes": 2}
    assert answer["forgotten"] == 3 and answer["absent"] == 0
    with get_database(any_api.app).read() as session:
        cases = set(session.scalars(select(ScoredCaseRow.key)))
        keys = set(session.scalars(select(RecordRow.key)))
    assert cases == {"st-2", "st-3", "st-4"} and keys == {"st-2", "st-3"}
    assert day_sums()[0][0] == 2
    after = any_api.request("GET", "/v1/models/pump-risk/track-record", 200)
    assert after != before
    # The sums left are those of st-2 and st-3 alone: forgetting those too
    # leaves no day row at all (the counts come out exact).
    any_api.request("POST", FORGET, 200, json_body={"keys": ["st-2", "st-3"]})
    assert day_sums() == []


def test_forgetting_again_changes_nothing_and_records_nothing(any_api: ApiClient) -> None:
    rows = keyed_model(any_api, 10)
    add_version(any_api.app, "pump-risk", 1, cursor=rows[-1][0], status="active", active=True)
    body = {"keys": [rows[0][1], rows[3][1]]}
    first = any_api.request("POST", FORGET + "?retrain=true", 200, json_body=body)
    assert first["forgotten"] == 2 and first["retrain"]["status"] == "queued"
    before = everything(any_api.app)
    again = any_api.request("POST", FORGET + "?retrain=true", 200, json_body=body)
    assert (again["forgotten"], again["absent"], again["event"], again["retrain"]) == (
        0, 2, None, None)
    assert again["message"] == "None of these keys is stored: nothing was changed."
    assert everything(any_api.app) == before


def test_forgetting_drops_the_trainers_lease_and_requeues_running_retrains(
        any_api: ApiClient) -> None:
    rows = keyed_model(any_api, 10)
    with get_database(any_api.app).write() as session:
        model_id = session.scalars(select(ModelRow.id)).one()
        session.execute(update(TrainerRow).values(cursor=rows[3][0], leased_by="worker-a"))
        session.add(JobRow(model_id=model_id, kind="retrain", status="running",
                           params={"warm_start": False}, attempts=1, leased_by="worker-b"))
        session.commit()
    any_api.request("POST", FORGET, 200, json_body={"keys": [rows[5][1]]})
    with get_database(any_api.app).read() as session:
        trainer = session.get_one(TrainerRow, model_id)
        job = session.scalars(select(JobRow)).one()
    assert trainer.leased_by is None and trainer.cursor == rows[3][0]
    assert (job.status, job.leased_by, job.attempts) == ("queued", None, 0)


def test_a_new_record_never_takes_a_forgotten_sequence_number(any_api: ApiClient) -> None:
    rows = keyed_model(any_api, 5)
    any_api.request("POST", FORGET, 200, json_body={"keys": [rows[-1][1]]})
    ingest_raw(get_database(any_api.app).write, "pump-risk", [record(9, key="pump-new")])
    assert stored(any_api.app)[-1][0] > rows[-1][0]


def test_refused_requests_change_no_row(any_api: ApiClient) -> None:
    rows = keyed_model(any_api, 5)
    reader = any_api.token("ingest", "predict")
    before = everything(any_api.app)
    key = rows[0][1]
    too_many = [f"k-{i}" for i in range(10_001)]
    refused = [
        (413, {"keys": too_many}, FORGET, None),
        (422, {"keys": []}, FORGET, None),
        (422, {"keys": [key, ""]}, FORGET, None),
        (422, {"keys": [key, "a\u0000b"]}, FORGET, None),
        (422, {"keys": [key], "extra": 1}, FORGET, None),
        (422, {"keys": key}, FORGET, None),
        (422, {"keys": [key]}, FORGET + "?retrain=maybe", None),
        (404, {"keys": [key]}, "/v1/models/no-such-model/records/forget", None),
        (403, {"keys": [key]}, FORGET, reader),
        (401, {"keys": [key]}, FORGET, "not-a-token"),
    ]
    for status, body, path, token in refused:
        kwargs = {} if token is None else {"token": token}
        problem = any_api.request("POST", path, status, json_body=body, **kwargs)
        assert problem["status"] == status
    assert everything(any_api.app) == before
    assert "10000" in any_api.request("POST", FORGET, 413, json_body={"keys": too_many})[
        "detail"]
