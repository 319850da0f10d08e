"""The bad-input catalogue for ingest: each case gets the right 4xx, a problem
details body (RFC 9457) naming the field, and changes no row."""

from __future__ import annotations

import json
from typing import Any

import pytest
from flask import Flask

from tests.service.conftest import build_app
from tests.service.helpers import ApiClient, count_records, create_model, model_row, record

RECORDS = "/v1/models/pump-risk/records"
GOOD = record(1)


def features(**changes: Any) -> dict[str, Any]:
    row = dict(GOOD["features"])
    for name, value in changes.items():
        if value is ...:
            del row[name]
        else:
            row[name] = value
    return row


def batch(*rows: Any) -> str:
    return json.dumps({"records": list(rows)})


def with_features(**changes: Any) -> str:
    return batch(record(0, key="good"), {"features": features(**changes), "label": "ok"})


# (case, body, content type, status, a field path the problem must name or None)
JSON = "application/json"
CSV = "text/csv"
CSV_HEADER = "key,vibration_rms,pump_family,has_vfd,failed_within_30d\r\n"
CATALOGUE: list[tuple[str, str | bytes, str | None, int, str | None]] = [
    ("string in a number", with_features(vibration_rms="4.1"), JSON, 422,
     "records.1.features.vibration_rms"),
    ("boolean in a number", with_features(vibration_rms=True), JSON, 422,
     "records.1.features.vibration_rms"),
    ("number in a boolean", with_features(has_vfd=1), JSON, 422, "records.1.features.has_vfd"),
    ("NaN literal", with_features(vibration_rms=0.5).replace("0.5", "NaN"), JSON, 422,
     "records.1.features.vibration_rms"),
    ("Infinity literal", with_features(vibration_rms=0.5).replace("0.5", "Infinity"), JSON,
     422, "records.1.features.vibration_rms"),
    ("-Infinity literal", with_features(vibration_rms=0.5).replace("0.5", "-Infinity"), JSON,
     422, "records.1.features.vibration_rms"),
    ("number overflowing to infinity", with_features(vibration_rms=0.5).replace("0.5", "1e999"),
     JSON, 422, "records.1.features.vibration_rms"),
    ("missing field", with_features(has_vfd=...), JSON, 422, "records.1.features.has_vfd"),
    ("unknown field", with_features(colour="red"), JSON, 422, "records.1.features.colour"),
    ("null field", with_features(has_vfd=None), JSON, 422, "records.1.features.has_vfd"),
    ("above the maximum", with_features(vibration_rms=100.5), JSON, 422,
     "records.1.features.vibration_rms"),
    ("below the minimum", with_features(vibration_rms=-0.1), JSON, 422,
     "records.1.features.vibration_rms"),
    ("unknown level", with_features(pump_family="vortex"), JSON, 422,
     "records.1.features.pump_family"),
    ("level of the wrong type", with_features(pump_family=1), JSON, 422,
     "records.1.features.pump_family"),
    ("unknown class", batch({"features": features(), "label": "broken"}), JSON, 422,
     "records.0.label"),
    ("class of the wrong type", batch({"features": features(), "label": True}), JSON, 422,
     "records.0.label"),
    ("missing label", batch({"features": features()}), JSON, 422, "records.0.label"),
    ("null label", batch({"features": features(), "label": None}), JSON, 422, "records.0.label"),
    ("unknown record field", batch({**GOOD, "weight": 2}), JSON, 422, "records.0.weight"),
    ("features not an object", batch({"features": [1, 2], "label": "ok"}), JSON, 422,
     "records.0.features"),
    ("record not an object", batch("x"), JSON, 422, "records.0"),
    ("empty key", batch({**GOOD, "key": ""}), JSON, 422, "records.0.key"),
    ("over-long key", batch({**GOOD, "key": "k" * 201}), JSON, 422, "records.0.key"),
    ("number as key", batch({**GOOD, "key": 7}), JSON, 422, "records.0.key"),
    ("null key", batch({**GOOD, "key": None}), JSON, 422, "records.0.key"),
    ("empty batch", batch(), JSON, 422, "records"),
    ("records missing", json.dumps({"rows": []}), JSON, 422, "records"),
    ("records not a list", json.dumps({"records": {"a": 1}}), JSON, 422, "records"),
    ("unknown top-level field", json.dumps({"records": [GOOD], "x": 1}), JSON, 422, "x"),
    ("body not an object", json.dumps([GOOD]), JSON, 422, "body"),
    ("broken JSON", '{"records": [', JSON, 400, None),
    ("trailing garbage", batch(GOOD) + "x", JSON, 400, None),
    ("not UTF-8", batch(GOOD).encode("utf-16"), JSON, 400, None),
    ("nested too deep", '{"records": ' + "[" * 200 + "]" * 200 + "}", JSON, 400, None),
    ("wrong content type", batch(GOOD), "text/plain", 415, None),
    ("form content type", "records=1", "application/x-www-form-urlencoded", 415, None),
    ("no content type", batch(GOOD), None, 415, None),
    ("JSON in another charset", batch(GOOD), "application/json; charset=latin-1", 415, None),
    ("CSV in another charset", CSV_HEADER, "text/csv; charset=latin-1", 415, None),
    ("broken CSV quoting", CSV_HEADER + 'k,"1.0,screw,true,ok\r\n', CSV, 400, None),
    ("CSV row too short", CSV_HEADER + "k,1.0,screw,true\r\n", CSV, 422, "records.0"),
    ("CSV string in a number", CSV_HEADER + "k,abc,screw,true,ok\r\n", CSV, 422,
     "records.0.features.vibration_rms"),
    ("CSV NaN", CSV_HEADER + "k,nan,screw,true,ok\r\n", CSV, 422,
     "records.0.features.vibration_rms"),
    ("CSV empty cell", CSV_HEADER + "k,,screw,true,ok\r\n", CSV, 422,
     "records.0.features.vibration_rms"),
    ("CSV unknown boolean", CSV_HEADER + "k,1,screw,maybe,ok\r\n", CSV, 422,
     "records.0.features.has_vfd"),
    ("CSV unknown class", CSV_HEADER + "k,1,screw,true,broken\r\n", CSV, 422,
     "records.0.label"),
    ("CSV unknown column", "colour," + CSV_HEADER + "red,k,1,screw,true,ok\r\n", CSV, 422,
     "columns.colour"),
    ("CSV missing column", "vibration_rms,pump_family,failed_within_30d\r\n1,screw,ok\r\n",
     CSV, 422, "columns.has_vfd"),
    ("CSV repeated column", "has_vfd," + CSV_HEADER + "true,k,1,screw,true,ok\r\n", CSV, 422,
     "columns.has_vfd"),
    ("CSV without records", CSV_HEADER, CSV, 422, "records"),
    ("empty CSV", "", CSV, 400, None),
]


@pytest.fixture
def loaded(app: Flask, api: ApiClient) -> ApiClient:
    """A model holding one record already, so "nothing changed" is not vacuous."""
    create_model(api)
    api.request("POST", RECORDS, 201, json_body={"records": [record(9, key="first")]})
    return api


@pytest.mark.parametrize(
    ("body", "content_type", "status", "field"),
    [case[1:] for case in CATALOGUE],
    ids=[case[0] for case in CATALOGUE],
)
def test_bad_input_is_refused_and_changes_nothing(
    loaded: ApiClient, app: Flask, body: str | bytes, content_type: str | None, status: int,
    field: str | None,
) -> None:
    before = model_row(app, "pump-risk")
    problem = loaded.request("POST", RECORDS, status, data=body, content_type=content_type)
    assert problem["status"] == status and problem["detail"]
    assert set(problem) <= {"type", "title", "status", "detail", "errors"}
    if field is not None:
        assert field in problem["errors"], problem["errors"]
        assert all(isinstance(m, str) for ms in problem["errors"].values() for m in ms)
    assert count_records(app) == 1
    after = model_row(app, "pump-risk")
    assert (after.records_train, after.records_holdout) == (
        before.records_train, before.records_holdout)


def test_every_bad_field_of_a_batch_is_named(loaded: ApiClient, app: Flask) -> None:
    rows = [record(i) for i in range(10)]
    rows[3]["features"]["vibration_rms"] = "high"
    rows[7]["label"] = "unknown"
    del rows[7]["features"]["has_vfd"]
    problem = loaded.request("POST", RECORDS, 422, json_body={"records": rows})
    assert problem["errors"] == {
        "records.3.features.vibration_rms": ["Not a number."],
        "records.7.features.has_vfd": ["Missing data for required field."],
        "records.7.label": ["Unknown class 'unknown'; expected one of ['ok', 'failed']."],
    }
    assert count_records(app) == 1


@pytest.mark.parametrize("path", [
    "/v1/models/PUMP-RISK/records",
    "/v1/models/%2e%2e/records",
    "/v1/models/pump-risk%00/records",
    "/v1/models/" + "a" * 65 + "/records",
    "/v1/models/pump-risk/records/extra",
    "/v1/models/%20/records",
])
def test_bad_model_names_and_path_tricks_are_not_found(
    loaded: ApiClient, app: Flask, path: str
) -> None:
    loaded.request("POST", path, 404, json_body={"records": [GOOD]})
    assert count_records(app) == 1


def test_an_encoded_slash_in_the_path_is_refused(loaded: ApiClient, app: Flask) -> None:
    # %2F would be decoded into a separator before routing (service/web/paths.py).
    loaded.request("POST", "/v1/models/..%2fpump-risk/records", 400,
                   json_body={"records": [GOOD]})
    assert count_records(app) == 1


def test_more_records_than_the_limit_is_too_large(sqlite_url: str) -> None:
    app = build_app(sqlite_url)
    api = ApiClient(app)
    create_model(api)
    rows = [record(i) for i in range(10_001)]
    problem = api.request("POST", RECORDS, 413, json_body={"records": rows})
    assert problem["detail"] == "At most 10000 records per request; got 10001."
    text = CSV_HEADER + "".join(f"k{i},1,screw,true,ok\r\n" for i in range(10_001))
    api.request("POST", RECORDS, 413, data=text, content_type=CSV)
    assert count_records(app) == 0


def test_a_body_over_16_mib_is_too_large(api: ApiClient, app: Flask) -> None:
    create_model(api)
    body = b'{"records": [' + b" " * (16 * 1024 * 1024) + b"]}"
    problem = api.request("POST", RECORDS, 413, data=body, content_type=JSON)
    assert problem["title"] == "Request Entity Too Large" or problem["status"] == 413
    assert count_records(app) == 0


def test_the_limits_are_configurable(sqlite_url: str) -> None:
    app = build_app(sqlite_url, KEELSON_MAX_RECORDS_PER_REQUEST=2, KEELSON_MAX_BODY_BYTES=2000)
    api = ApiClient(app)
    create_model(api)
    api.request("POST", RECORDS, 201, json_body={"records": [record(1), record(2)]})
    api.request("POST", RECORDS, 413, json_body={"records": [record(1)] * 3})
    api.request("POST", RECORDS, 413, data=" " * 2001, content_type=JSON)
    assert count_records(app) == 2
