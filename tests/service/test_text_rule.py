"""Text the API takes is Unicode scalar values, and names are matched whole.

A JSON string may spell a lone surrogate (``"\\ud800"``); RFC 8259 section 8.2
leaves what a receiver then does unpredictable, and RFC 7493 (I-JSON) section
2.1 says such strings MUST NOT appear. Keelson refuses one (422) wherever it
is, naming the field, before anything is stored: a spec holding one was stored
and the worker could not decode it again. A name that is a regular pattern
followed by a newline (``"station-risk\\n"``) is refused too: ``$`` matched
before it.
"""

from __future__ import annotations

import json
from typing import Any

import pytest
from flask import Flask
from hypothesis import given, settings
from hypothesis import strategies as st

from service.errors import InvalidInputError, NotFoundError
from service.text import is_scalar_text
from service.usecases.tokens import create_token, list_tokens, revoke_token
from service.web.bodies import loads_strict, may_hold_lone_surrogates
from service.web.extensions import get_database
from service.web.observability import request_id_for
from service.web.problems import problem
from tests.service.helpers import PUMP_SPEC, ApiClient, create_model, model_spec, record

LONE = "\ud800"
SHOWN = "\\ud800"  # how a lone surrogate is shown in an answer: escaped, as text
SPEC_CASES: list[tuple[str, Any, str]] = [
    # (where, how the spec is changed, the error path)
    ("a class", lambda s: s.update(classes=["ok", LONE]), "classes.1"),
    ("a level", lambda s: s["features"][1].update(levels=["screw", LONE]),
     "features.1.levels.1"),
    ("a unit", lambda s: s["features"][0].update(unit="mm" + LONE), "features.0.unit"),
    ("the name", lambda s: s.update(name="pump" + LONE), "name"),
    ("the target", lambda s: s.update(target="t" + LONE), "target"),
    ("a feature name", lambda s: s["features"][2].update(name="vfd" + LONE), "features.2.name"),
    ("the task", lambda s: s.update(task=LONE), "task"),
    ("a training option", lambda s: s.update(training={"optimizer": LONE}),
     "training.optimizer"),
]


def sent(api: ApiClient, path: str, body: Any, status: int) -> Any:
    """``body`` as JSON text with every non-ASCII character escaped (so a lone
    surrogate goes out as the six characters ``\\ud800``, as a client sends it)."""
    return api.request("POST", path, status, data=json.dumps(body),
                       content_type="application/json")


@pytest.mark.parametrize(("where", "change", "path"), SPEC_CASES,
                         ids=[case[0] for case in SPEC_CASES])
def test_a_lone_surrogate_in_a_spec_is_a_422_naming_the_field(
        any_api: ApiClient, where: str, change: Any, path: str) -> None:
    spec = model_spec()
    change(spec)
    body = sent(any_api, "/v1/models", spec, 422)
    assert list(body["errors"]) == [path], body
    assert "Unicode" in body["errors"][path][0]
    assert any_api.request("GET", "/v1/models", 200)["models"] == []


def test_a_lone_surrogate_as_an_unknown_key_is_a_422_shown_escaped(any_api: ApiClient) -> None:
    body = sent(any_api, "/v1/models", {**PUMP_SPEC, "nick" + LONE: 1}, 422)
    assert list(body["errors"]) == ["nick" + SHOWN], body


def test_a_surrogate_pair_is_one_character_and_welcome(any_api: ApiClient) -> None:
    # "\ud83d\udca7" is the escaped pair of U+1F4A7 (a droplet): valid JSON text.
    spec = model_spec()
    spec["features"][1]["levels"] = ["screw", "\U0001f4a7"]
    created = sent(any_api, "/v1/models", spec, 201)
    assert created["features"][1]["levels"] == ["screw", "\U0001f4a7"]
    row = record(1, key="drop-\U0001f4a7", pump_family="\U0001f4a7")
    assert sent(any_api, "/v1/models/pump-risk/records", {"records": [row]}, 201) == {
        "accepted": 1, "duplicates": 0}


RECORD_CASES: list[tuple[str, Any, str]] = [
    ("the key", lambda r: r.update(key="k" + LONE), "records.0.key"),
    ("a level", lambda r: r["features"].update(pump_family=LONE),
     "records.0.features.pump_family"),
    ("the label", lambda r: r.update(label=LONE), "records.0.label"),
    ("a feature's name", lambda r: r["features"].update({"x" + LONE: 1.0}),
     "records.0.features.x" + SHOWN),
    ("a record member's name", lambda r: r.update({LONE: 1}), "records.0." + SHOWN),
]


@pytest.mark.parametrize(("where", "change", "path"), RECORD_CASES,
                         ids=[case[0] for case in RECORD_CASES])
def test_a_lone_surrogate_in_a_record_is_a_422_naming_the_field(
        any_api: ApiClient, where: str, change: Any, path: str) -> None:
    create_model(any_api)
    rows = [record(0, key="k0"), record(1, key="k1")]
    change(rows[0])
    body = sent(any_api, "/v1/models/pump-risk/records", {"records": rows}, 422)
    assert list(body["errors"]) == [path], body
    if where in ("a level", "a feature's name"):  # a prediction takes the same features
        prediction = {"records": [{"features": rows[0]["features"]}]}
        body = sent(any_api, "/v1/models/pump-risk/predictions", prediction, 422)
        assert list(body["errors"]) == [path], body


def test_a_lone_surrogate_in_a_retrain_body_is_a_422(any_api: ApiClient) -> None:
    create_model(any_api)
    body = sent(any_api, "/v1/models/pump-risk/retrain", {"warm_start": LONE}, 422)
    assert list(body["errors"]) == ["warm_start"], body


def test_text_in_the_path_or_the_query_must_be_utf8(api: ApiClient) -> None:
    create_model(api)
    # %ED%A0%80 is U+D800 as UTF-8 would spell it: not UTF-8 (RFC 3629 section 3).
    body = api.request("GET", "/v1/models/pump%ED%A0%80", 400)
    assert "UTF-8" in body["detail"]
    body = api.request("GET", "/v1/models/pump-risk/predictions?vibration_rms=1"
                       "&pump_family=%ED%A0%80&has_vfd=true", 400)
    assert "UTF-8" in body["detail"]
    body = api.request("GET", "/v1/models/pump-risk/predictions?%ED%A0%80=1", 400)
    assert "UTF-8" in body["detail"]


def test_a_csv_cell_or_header_that_is_not_utf8_is_a_400_in_our_words(api: ApiClient) -> None:
    create_model(api)
    good = "key,vibration_rms,pump_family,has_vfd,failed_within_30d\nk1,1.0,screw,true,ok\n"
    for broken in (good.replace("screw", "scr\udc80ew"), good.replace("key", "k\udc80ey")):
        data = broken.encode("utf-8", "surrogateescape").replace(b"\x80", b"\xed\xa0\x80")
        body = api.request("POST", "/v1/models/pump-risk/records", 400, data=data,
                           content_type="text/csv")
        assert "UTF-8" in body["detail"] and "codec" not in body["detail"], body


def test_the_error_envelope_renders_any_text() -> None:
    response = problem(422, "Bad " + LONE, errors={"x" + LONE: ["no " + LONE]})
    body = json.loads(response.get_data())
    assert body["detail"] == "Bad " + SHOWN
    assert body["errors"] == {"x" + SHOWN: ["no " + SHOWN]}


@pytest.mark.parametrize(("change", "path"), [
    (lambda s: s.update(name="station-risk\n"), "name"),
    (lambda s: s.update(target="failed\n"), "target"),
    (lambda s: s["features"][0].update(name="vibration_rms\n"), "features.0.name"),
], ids=["name", "target", "feature"])
def test_a_name_with_a_trailing_newline_is_refused(any_api: ApiClient, change: Any,
                                                   path: str) -> None:
    spec = model_spec()
    change(spec)
    body = any_api.request("POST", "/v1/models", 422, json_body=spec)
    assert list(body["errors"]) == [path], body


def test_a_feature_name_with_a_trailing_newline_is_unknown_in_a_record(api: ApiClient) -> None:
    create_model(api)
    row = record(0)
    row["features"]["vibration_rms\n"] = row["features"].pop("vibration_rms")
    body = api.request("POST", "/v1/models/pump-risk/predictions", 422,
                       json_body={"records": [{"features": row["features"]}]})
    assert body["errors"] == {"records.0.features.vibration_rms\n": ["Unknown field."],
                              "records.0.features.vibration_rms": [
                                  "Missing data for required field."]}


def test_the_published_name_patterns_match_whole_names(api: ApiClient) -> None:
    document = api.request("GET", "/openapi.json", 200, token=None)
    spec = document["components"]["schemas"]["ModelSpec"]["properties"]
    # JSON Schema's pattern is ECMA-262 (JSON Schema 2020-12 validation, section
    # 6.3.3): there "$" matches only at the end, so "^...$" is a whole match.
    assert spec["name"]["pattern"] == "^[a-z0-9][a-z0-9-]{0,63}$"
    assert spec["target"]["pattern"] == "^[A-Za-z_][A-Za-z0-9_]{0,63}$"


def test_broken_json_is_answered_in_our_words_with_line_and_column(api: ApiClient) -> None:
    body = api.request("POST", "/v1/models", 400, data='{"name":\n  nope}',
                       content_type="application/json")
    assert body["detail"] == "The body is not valid JSON: line 2, column 3."
    body = api.request("POST", "/v1/models", 400, data=b'{"name": "\xff"}',
                       content_type="application/json")
    assert body["detail"] == ("The body is not UTF-8 (RFC 8259 section 8.1): "
                              "byte 11 is not part of a UTF-8 character.")


def test_a_token_name_that_is_not_unicode_text_is_refused(any_app: Flask) -> None:
    # Python reads command-line bytes that are not UTF-8 as lone surrogates
    # (PEP 383): b"ops\xff" arrives as "ops\udcff".
    with pytest.raises(InvalidInputError) as refused:
        create_token(get_database(any_app), "ops\udcff", ["admin"])
    assert list(refused.value.errors or {}) == ["name"]
    assert list_tokens(get_database(any_app)) == []


def test_revoking_by_a_name_that_is_not_unicode_text_finds_none(any_app: Flask) -> None:
    with pytest.raises(NotFoundError):
        revoke_token(get_database(any_app), "ops\udcff")
    # "²" is a digit to str.isdigit, but no number int() reads: a name, matching none.
    with pytest.raises(NotFoundError):
        revoke_token(get_database(any_app), "²")


# Pieces of JSON string text: surrogate escapes (high, low, upper case), an
# escaped backslash (which makes "\\ud83d" plain text), other escapes, letters.
PIECES = ["\\ud83d", "\\udca7", "\\uD800", "\\uDFFF", "\\\\", "\\u00e9", "u", "d83d", "a", "é"]


@settings(max_examples=400, deadline=None)
@given(st.lists(st.sampled_from(PIECES), max_size=8))
def test_the_body_prefilter_never_misses_a_lone_surrogate(pieces: list[str]) -> None:
    data = ('{"k": "' + "".join(pieces) + '"}').encode()
    value = json.loads(data)["k"]
    if not is_scalar_text(value):
        assert may_hold_lone_surrogates(data), data
        with pytest.raises(InvalidInputError) as refused:
            loads_strict(data)
        assert list(refused.value.errors or {}) == ["k"]
    else:
        assert loads_strict(data) == {"k": value}


def test_a_request_id_with_a_trailing_newline_is_not_echoed() -> None:
    assert request_id_for("pump-7") == "pump-7"
    assert request_id_for("pump-7\n") != "pump-7\n"
