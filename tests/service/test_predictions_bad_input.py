"""The bad-input catalogue for predictions: each bad request gets the right 4xx
and a problem details body (RFC 9457) naming the offending parameter or path,
and changes nothing in the store."""

from __future__ import annotations

import json
from http import HTTPStatus
from typing import Any

import pytest
from flask import Flask
from sqlalchemy import select

from service.store.tables import ModelRow, VersionRow
from service.web.bodies import MAX_DEPTH
from service.web.extensions import get_database
from service.web.schemas.fields import NON_FINITE
from tests.service.helpers import ApiClient, create_model
from tests.service.predictions_factory import (
    add_version,
    numeric_rows,
    pump_rows,
    pump_rule,
    stored_spec,
    train_learner,
)

PATH = "/v1/models/pump-risk/predictions"
GOOD = {"vibration_rms": "4.1", "pump_family": "screw", "has_vfd": "true"}
GOOD_ROW = {"vibration_rms": 4.1, "pump_family": "screw", "has_vfd": True}
INVALID = "urn:keelson:problem:invalid-input"
LEVELS = "expected one of ['centrifugal', 'screw']."
EXPLAINS = ("Must be one of: integrated_gradients, gradient, gradient_times_input, "
            "smoothgrad, shapley, none.")


@pytest.fixture
def served(api: ApiClient) -> ApiClient:
    create_model(api)
    spec = stored_spec(api.app, "pump-risk")
    add_version(api.app, "pump-risk", train_learner(spec, pump_rows(100), pump_rule).to_bytes())
    return api


def store_state(app: Flask) -> list[Any]:
    with get_database(app).read() as session:
        models = session.execute(select(ModelRow.name, ModelRow.active_version_id)).all()
        versions = session.execute(select(VersionRow.id, VersionRow.status)).all()
    return [models, versions]


def query(**changes: str | None) -> str:
    params = {**GOOD, **changes}
    return "&".join(f"{k}={v}" for k, v in params.items() if v is not None)


def invalid(detail: str, errors: dict[str, list[str]], status: int = 422) -> dict[str, Any]:
    return {"type": INVALID, "title": HTTPStatus(status).phrase, "status": status,
            "detail": detail, "errors": errors}


QUERY_DETAIL = "The query has invalid parameters."
GET_CASES = [
    ("string in a number", query(vibration_rms="abc"), {"vibration_rms": ["Not a number."]}),
    ("NaN", query(vibration_rms="NaN"), {"vibration_rms": [NON_FINITE]}),
    ("Infinity", query(vibration_rms="Infinity"), {"vibration_rms": [NON_FINITE]}),
    ("-Infinity", query(vibration_rms="-Infinity"), {"vibration_rms": [NON_FINITE]}),
    ("empty number", query(vibration_rms=""), {"vibration_rms": ["Not a number."]}),
    # Text numbers follow the JSON number grammar (RFC 8259 section 6), not Python's float().
    ("digit separators", query(vibration_rms="1_0"), {"vibration_rms": ["Not a number."]}),
    ("leading plus", query(vibration_rms="%2B4"), {"vibration_rms": ["Not a number."]}),
    ("hexadecimal", query(vibration_rms="0x1A"), {"vibration_rms": ["Not a number."]}),
    ("non-ASCII digits", query(vibration_rms="\u0664"), {"vibration_rms": ["Not a number."]}),
    ("missing field", query(has_vfd=None), {"has_vfd": ["Missing data for required field."]}),
    ("unknown field", query(colour="red"), {"colour": ["Unknown field."]}),
    ("below the minimum", query(vibration_rms="-0.5"), {"vibration_rms": ["Must be at least 0."]}),
    ("above the maximum", query(vibration_rms="100.5"),
     {"vibration_rms": ["Must be at most 100."]}),
    ("unknown level", query(pump_family="piston"),
     {"pump_family": [f"Unknown level 'piston'; {LEVELS}"]}),
    ("not a boolean", query(has_vfd="maybe"), {"has_vfd": ["Not a boolean (true or false)."]}),
    ("repeated parameter", query() + "&pump_family=screw",
     {"pump_family": ["Given more than once."]}),
    ("bad explain", query(explain="lime"), {"explain": [EXPLAINS]}),
    ("unknown output class", query(output="broken"),
     {"output": ["Unknown class 'broken'; expected one of ['ok', 'failed']."]}),
    ("steps too few", query(steps="1"), {"steps": ["Must be at least 2."]}),
    ("steps too many", query(steps="1025"), {"steps": ["Must be at most 1024."]}),
    ("steps not an integer", query(steps="7.5"), {"steps": ["Not an integer."]}),
    ("version zero", query(version="0"), {"version": ["Must be at least 1."]}),
    ("version not a number", query(version="latest"), {"version": ["Not an integer."]}),
    ("negative noise", query(explain="smoothgrad", noise="-1"),
     {"noise": ["Must be at least 0."]}),
    ("every bad parameter at once", query(vibration_rms="x", output="y", steps="0"),
     {"vibration_rms": ["Not a number."], "steps": ["Must be at least 2."],
      "output": ["Unknown class 'y'; expected one of ['ok', 'failed']."]}),
]


@pytest.mark.parametrize(("case", "query_string", "errors"), GET_CASES,
                         ids=[case[0] for case in GET_CASES])
def test_a_bad_query_is_a_422_naming_the_parameter(
    served: ApiClient, case: str, query_string: str, errors: dict[str, list[str]]
) -> None:
    before = store_state(served.app)
    body = served.request("GET", f"{PATH}?{query_string}", 422)
    assert body == invalid(QUERY_DETAIL, errors)
    assert store_state(served.app) == before


def records(*rows: Any) -> dict[str, Any]:
    return {"records": [{"features": row} for row in rows]}


BODY_DETAIL = "The request is invalid."
POST_CASES = [
    ("string in a number", records({**GOOD_ROW, "vibration_rms": "4.1"}),
     {"records.0.features.vibration_rms": ["Not a number."]}),
    ("boolean in a number", records(GOOD_ROW, {**GOOD_ROW, "vibration_rms": True}),
     {"records.1.features.vibration_rms": ["Not a number."]}),
    ("null field", records({**GOOD_ROW, "has_vfd": None}),
     {"records.0.features.has_vfd": ["Field may not be null."]}),
    ("missing field", records({"vibration_rms": 1.0, "pump_family": "screw"}),
     {"records.0.features.has_vfd": ["Missing data for required field."]}),
    ("unknown field", records({**GOOD_ROW, "colour": "red"}),
     {"records.0.features.colour": ["Unknown field."]}),
    ("out of bounds", records({**GOOD_ROW, "vibration_rms": 1e6}),
     {"records.0.features.vibration_rms": ["Must be at most 100."]}),
    ("unknown level", records({**GOOD_ROW, "pump_family": "piston"}),
     {"records.0.features.pump_family": [f"Unknown level 'piston'; {LEVELS}"]}),
    ("a label is not for predictions", {"records": [{"features": GOOD_ROW, "label": "ok"}]},
     {"records.0.label": ["Unknown field."]}),
    ("features not an object", {"records": [{"features": [1, 2]}]},
     {"records.0.features": ["Not a valid mapping."]}),
    ("record not an object", {"records": [3]}, {"records.0": ['Expected {"features": {...}}.']}),
    ("empty batch", {"records": []}, {"records": ["At least one record is needed."]}),
    ("no records", {"explain": "gradient"}, {"records": ["Missing data for required field."]}),
    ("records not a list", {"records": {"features": GOOD_ROW}},
     {"records": ["Not a valid list."]}),
    ("unknown body field", {**records(GOOD_ROW), "limit": 3}, {"limit": ["Unknown field."]}),
    ("bad explain", {**records(GOOD_ROW), "explain": "lime"}, {"explain": [EXPLAINS]}),
    ("null explain", {**records(GOOD_ROW), "explain": None},
     {"explain": ["Field may not be null."]}),
    ("output of the wrong type", {**records(GOOD_ROW), "output": 1},
     {"output": ["Unknown class 1; expected one of ['ok', 'failed']."]}),
    ("steps as a string", {**records(GOOD_ROW), "steps": "64"}, {"steps": ["Not an integer."]}),
    ("steps as a boolean", {**records(GOOD_ROW), "steps": True},
     {"steps": ["Not an integer."]}),
    ("version with a fraction", {**records(GOOD_ROW), "version": 1.5},
     {"version": ["Not an integer."]}),
]


@pytest.mark.parametrize(("case", "payload", "errors"), POST_CASES,
                         ids=[case[0] for case in POST_CASES])
def test_a_bad_body_is_a_422_naming_the_path(
    served: ApiClient, case: str, payload: Any, errors: dict[str, list[str]]
) -> None:
    before = store_state(served.app)
    body = served.request("POST", PATH, 422, json_body=payload)
    assert body == invalid(BODY_DETAIL, errors)
    assert store_state(served.app) == before


def test_nan_and_infinity_literals_in_a_body_are_refused_at_their_path(
    served: ApiClient,
) -> None:
    # RFC 8259 section 6: NaN and Infinity are not JSON numbers.
    raw = ('{"records": [{"features": {"vibration_rms": 1, "pump_family": "screw", '
           '"has_vfd": true}}, {"features": {"vibration_rms": -Infinity, '
           '"pump_family": "screw", "has_vfd": true}}], "noise": NaN}')
    body = served.request("POST", PATH, 422, data=raw, content_type="application/json")
    assert body == invalid("The body holds numbers JSON does not allow.", {
        "records.1.features.vibration_rms": ["-Infinity is not a JSON number (RFC 8259 "
                                             "section 6)."],
        "noise": ["NaN is not a JSON number (RFC 8259 section 6)."],
    })


def test_query_parameters_of_a_post_are_options_only_and_must_agree(served: ApiClient) -> None:
    body = served.request("POST", f"{PATH}?vibration_rms=3&explain=gradient&steps=abc", 422,
                          json_body={**records(GOOD_ROW), "explain": "smoothgrad"})
    assert body == invalid(BODY_DETAIL, {
        "vibration_rms": ["Unknown query parameter; features go in the body."],
        "steps": ["Not an integer."],
        "explain": ["Given in the body and the query with different values."],
    })


def test_a_number_with_no_fraction_is_an_integer_as_json_schema_counts_it(
    served: ApiClient
) -> None:
    """JSON has one number type (RFC 8259 section 6); JSON Schema 2020-12
    (Validation, section 6.1.1) counts 1.0 as an integer, and so does the API."""
    body = served.request("POST", PATH, 200, json_body={**records(GOOD_ROW), "version": 1.0,
                                                        "steps": 8.0, "explain": "none"})
    assert body["version"] == 1


def test_an_over_long_batch_is_a_413_naming_records(served: ApiClient) -> None:
    body = served.request("POST", PATH, 413, json_body=records(*[GOOD_ROW] * 1001))
    assert body == invalid("At most 1000 records per prediction request.",
                           {"records": ["1001 records; at most 1000."]}, 413)
    served.request("POST", PATH, 200, json_body={**records(*[GOOD_ROW] * 1000),
                                                 "explain": "none"})


def test_broken_json_is_a_400_and_a_wrong_media_type_a_415(served: ApiClient) -> None:
    body = served.request("POST", PATH, 400, data='{"records": [', content_type="application/json")
    assert body["title"] == "Bad Request"
    assert body["detail"].startswith("The body is not valid JSON")
    body = served.request("POST", PATH, 400, data="[" * (MAX_DEPTH + 1) + "]" * (MAX_DEPTH + 1),
                          content_type="application/json")
    assert body["detail"] == f"The body nests deeper than {MAX_DEPTH} levels."
    body = served.request("POST", PATH, 415, data=json.dumps(records(GOOD_ROW)),
                          content_type="text/plain")
    assert body == {"type": "about:blank", "title": "Unsupported Media Type", "status": 415,
                    "detail": "Send the body as application/json, not text/plain."}
    body = served.request("POST", PATH, 422, data="[]", content_type="application/json")
    assert body == invalid("The body must be an object.",
                           {"body": ['Expected {"records": [...]}.']})


def test_a_regression_model_has_no_output_to_choose(api: ApiClient) -> None:
    create_model(api, name="flow", task="regression", target="litres", classes=None,
                 features=[{"name": "a", "type": "numeric"}, {"name": "b", "type": "numeric"}])
    add_version(api.app, "flow", train_learner(stored_spec(api.app, "flow"), numeric_rows(50),
                                               lambda r: r["a"] + r["b"]).to_bytes())
    body = api.request("GET", "/v1/models/flow/predictions?a=1&b=2&output=1", 422)
    assert body == invalid(QUERY_DETAIL, {
        "output": ["A regression model has one output; omit output."]})


def test_bad_model_names_and_path_tricks_are_404(served: ApiClient) -> None:
    for path in ("/v1/models/PUMP-RISK/predictions", "/v1/models/-x/predictions",
                 "/v1/models/" + "a" * 65 + "/predictions"):
        body = served.request("GET", f"{path}?{query()}", 404)
        assert body["title"] == "Not Found"
    # An encoded slash is refused before routing (service/web/paths.py).
    served.request("GET", f"/v1/models/pump-risk%2F..%2Fother/predictions?{query()}", 400)


def test_a_pinned_version_that_does_not_exist_is_a_404_naming_version(
    served: ApiClient,
) -> None:
    body = served.request("POST", f"{PATH}?version=4", 404, json_body=records(GOOD_ROW))
    assert body == invalid("Model 'pump-risk' has no version 4.",
                           {"version": ["No version 4."]}, 404)
