"""POST /v1/models/{name}/records: the contract, the split, and the store."""

from __future__ import annotations

import datetime as dt
import hashlib
from typing import Any

import pytest
from flask import Flask
from sqlalchemy import select

from service.errors import InvalidInputError
from service.store.tables import ModelRow, RecordRow, utcnow
from service.usecases.common import as_utc
from service.usecases.records import ModelChangedError, ingest_records, split_of
from service.web.extensions import get_database
from tests.service.helpers import (
    ApiClient,
    check_records,
    count_records,
    create_model,
    model_row,
    record,
)

RECORDS = "/v1/models/pump-risk/records"


def stored(app: Flask) -> list[RecordRow]:
    with get_database(app).read() as session:
        return list(session.scalars(select(RecordRow).order_by(RecordRow.seq)))


def test_records_are_stored_as_sent_in_sequence_order(any_api: ApiClient, any_app: Flask) -> None:
    model = create_model(any_api)
    sent = [record(i, key=f"st7-2026-w{i:02d}") for i in range(5)]
    body = any_api.request("POST", RECORDS, 201, json_body={"records": sent})
    assert body == {"accepted": 5, "duplicates": 0}
    rows = stored(any_app)
    assert [r.key for r in rows] == [s["key"] for s in sent]
    assert [r.features for r in rows] == [s["features"] for s in sent]
    assert [r.label for r in rows] == [s["label"] for s in sent]
    assert [r.seq for r in rows] == sorted(r.seq for r in rows)
    received = {as_utc(r.received_at) for r in rows}
    assert len(received) == 1 and abs(received.pop() - utcnow()) < dt.timedelta(minutes=1)
    assert all(r.model_id == model_row(any_app, "pump-risk").id for r in rows)
    assert len({r.seq for r in rows}) == 5
    shown = any_api.request("GET", "/v1/models/pump-risk", 200)
    holdout = sum(r.split == "holdout" for r in rows)
    assert shown["records"] == {"total": 5, "train": 5 - holdout, "holdout": holdout}
    assert shown["trainer"] == {"cursor": 0, "lag": 5, "paused": False}
    assert model["records"]["total"] == 0


def test_numbers_are_stored_as_floats_and_booleans_as_booleans(api: ApiClient, app: Flask) -> None:
    create_model(api)
    api.request("POST", RECORDS, 201, json_body={"records": [
        {"features": {"vibration_rms": 4, "pump_family": "screw", "has_vfd": True},
         "label": "failed"}]})
    row = stored(app)[0]
    assert row.features == {"vibration_rms": 4.0, "pump_family": "screw", "has_vfd": True}
    assert isinstance(row.features["vibration_rms"], float) and row.key is None


def test_a_stored_key_is_a_duplicate_and_changes_nothing(
    any_api: ApiClient, any_app: Flask
) -> None:
    create_model(any_api)
    any_api.request("POST", RECORDS, 201, json_body={"records": [record(1, key="a")]})
    before = [(r.seq, r.features, r.label) for r in stored(any_app)]
    changed = record(2, key="a")
    body = any_api.request("POST", RECORDS, 201, json_body={"records": [changed, record(3)]})
    assert body == {"accepted": 1, "duplicates": 1}
    after = stored(any_app)
    assert [(r.seq, r.features, r.label) for r in after[:1]] == before
    assert len(after) == 2
    assert model_row(any_app, "pump-risk").records_train + model_row(
        any_app, "pump-risk").records_holdout == 2


def test_a_key_repeated_within_a_batch_is_stored_once(api: ApiClient, app: Flask) -> None:
    create_model(api)
    batch = [record(1, key="a"), record(2, key="b"), record(3, key="a")]
    assert api.request("POST", RECORDS, 201, json_body={"records": batch}) == {
        "accepted": 2, "duplicates": 1}
    rows = stored(app)
    assert [(r.key, r.features) for r in rows] == [("a", batch[0]["features"]),
                                                   ("b", batch[1]["features"])]


def test_an_all_duplicate_batch_accepts_nothing(api: ApiClient, app: Flask) -> None:
    create_model(api)
    api.request("POST", RECORDS, 201, json_body={"records": [record(1, key="a")]})
    assert api.request("POST", RECORDS, 201, json_body={"records": [record(1, key="a")]}) == {
        "accepted": 0, "duplicates": 1}
    assert count_records(app) == 1


def test_the_split_follows_the_key_hash_and_the_holdout_fraction(
    any_api: ApiClient, any_app: Flask
) -> None:
    create_model(any_api, training={"holdout_fraction": 0.3})
    batch = [record(i, key=f"k{i}") for i in range(400)] + [record(i) for i in range(400)]
    any_api.request("POST", RECORDS, 201, json_body={"records": batch})
    model_id = model_row(any_app, "pump-risk").id
    rows = stored(any_app)
    for row in rows:
        # The rule written out independently: first 8 bytes of SHA-256 as a
        # fraction of 2**64 (common practice for hash-based splits, no source).
        text = f"{model_id}:{row.key}" if row.key is not None else f"{model_id}#{row.seq}"
        value = int.from_bytes(hashlib.sha256(text.encode()).digest()[:8], "big") / 2**64
        assert row.split == ("holdout" if value < 0.3 else "train")
    share = sum(r.split == "holdout" for r in rows) / len(rows)
    assert 0.25 < share < 0.35  # 800 draws: 3 standard deviations is about 0.05
    assert split_of(model_id, "k1", 0, 0.3) == split_of(model_id, "k1", 99, 0.3)


def test_the_same_keys_split_alike_on_every_backend(api: ApiClient) -> None:
    assert [split_of(1, f"k{i}", 0, 0.5) for i in range(8)] == [
        split_of(1, f"k{i}", 5, 0.5) for i in range(8)]
    assert {split_of(1, "k", 0, 0.0)} == {"train"}


def test_csv_records_are_stored_like_json_ones(any_api: ApiClient, any_app: Flask) -> None:
    create_model(any_api)
    text = (
        "has_vfd,key,vibration_rms,pump_family,failed_within_30d\r\n"
        "true,st1,4.1,screw,failed\r\n"
        "false,,\"0.5\",centrifugal,ok\r\n"
    )
    body = any_api.request("POST", RECORDS, 201, data=text, content_type="text/csv")
    assert body == {"accepted": 2, "duplicates": 0}
    rows = stored(any_app)
    assert [(r.key, r.features, r.label) for r in rows] == [
        ("st1", {"vibration_rms": 4.1, "pump_family": "screw", "has_vfd": True}, "failed"),
        (None, {"vibration_rms": 0.5, "pump_family": "centrifugal", "has_vfd": False}, "ok"),
    ]


def test_csv_labels_of_boolean_classes_and_regression_targets_are_typed(
    api: ApiClient, app: Flask
) -> None:
    spec: dict[str, Any] = {"features": [{"name": "x", "type": "numeric"}]}
    create_model(api, name="flag", classes=None, target="y", **spec)
    create_model(api, name="flow", task="regression", classes=None, target="y", **spec)
    api.request("POST", "/v1/models/flag/records", 201, data="x,y\n1,true\n2,false\n",
                content_type="text/csv")
    api.request("POST", "/v1/models/flow/records", 201, data="x,y\n1,2.5\n",
                content_type="text/csv; charset=utf-8")
    assert [r.label for r in stored(app)] == [True, False, 2.5]


def test_an_unknown_model_is_not_found_and_stores_nothing(api: ApiClient, app: Flask) -> None:
    body = api.request("POST", "/v1/models/nope/records", 404, json_body={"records": [record(1)]})
    assert body["detail"] == "There is no model named 'nope'."
    assert count_records(app) == 0


def test_records_of_two_models_keep_their_own_keys(api: ApiClient, app: Flask) -> None:
    create_model(api)
    create_model(api, name="other")
    api.request("POST", RECORDS, 201, json_body={"records": [record(1, key="a")]})
    body = api.request("POST", "/v1/models/other/records", 201,
                       json_body={"records": [record(1, key="a")]})
    assert body == {"accepted": 1, "duplicates": 0}
    assert count_records(app, "pump-risk") == count_records(app, "other") == 1


def test_the_use_case_takes_a_session_as_the_command_line_passes_it(
    api: ApiClient, app: Flask
) -> None:
    create_model(api)
    with get_database(app).write() as session:
        checked = check_records(session, "pump-risk", [record(1, key="a"), record(2)])
        result = ingest_records(session, "pump-risk", checked)
        assert (result.accepted, result.duplicates) == (2, 0)
        with pytest.raises(InvalidInputError) as error:
            check_records(session, "pump-risk", [record(3), {"features": {}, "label": "ok"}])
        assert "records.1.features.vibration_rms" in (error.value.errors or {})
    assert count_records(app) == 2


def replace_levels(app: Flask, levels: list[str]) -> None:
    """Give pump-risk other levels behind the API's back (the model "changed")."""
    with get_database(app).write() as session:
        row = session.scalars(select(ModelRow).where(ModelRow.name == "pump-risk")).one()
        spec = {**row.spec, "features": [dict(f) for f in row.spec["features"]]}
        spec["features"][1]["levels"] = levels
        row.spec = spec
        session.commit()


def test_records_checked_against_another_spec_are_never_stored(
    any_api: ApiClient, any_app: Flask
) -> None:
    create_model(any_api)
    with get_database(any_app).read() as session:
        checked = check_records(session, "pump-risk", [record(1, key="screw-1")])
    replace_levels(any_app, ["centrifugal", "vortex"])
    with pytest.raises(ModelChangedError) as error:
        ingest_records(get_database(any_app).write, "pump-risk", checked)
    assert error.value.status == 409
    assert count_records(any_app) == 0


def test_a_model_changed_after_the_check_answers_409_and_the_retry_is_checked_anew(
    any_api: ApiClient, any_app: Flask
) -> None:
    create_model(any_api)
    any_api.request("POST", RECORDS, 201, json_body={"records": [record(0)]})  # cache warm
    replace_levels(any_app, ["centrifugal", "vortex"])
    screw = record(1, key="k1")
    screw["features"]["pump_family"] = "screw"
    body = any_api.request("POST", RECORDS, 409, json_body={"records": [screw]})
    assert "changed" in body["detail"]
    assert any_api.last.headers["Retry-After"] == "0"
    # The retry is checked against the model as it now is: screw is no level of it.
    body = any_api.request("POST", RECORDS, 422, json_body={"records": [screw]})
    assert "records.0.features.pump_family" in body["errors"]
    screw["features"]["pump_family"] = "vortex"
    any_api.request("POST", RECORDS, 201, json_body={"records": [screw]})
    assert count_records(any_app) == 2
