"""Strict JSON parsing (RFC 8259) and configuration from the environment."""

from __future__ import annotations

import json
import logging

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.config import DEFAULTS, ConfigError, load_config
from service.errors import InvalidInputError, MalformedError, UnsupportedMediaError
from service.web.bodies import MAX_DEPTH, loads_strict, nesting_depth_exceeds, require_json


def test_plain_json_parses_as_the_standard_library_does() -> None:
    text = '{"a": [1, 2.5, -3e2, true, null, "x\\"]{"], "b": {"c": "\\u00e9"}}'
    assert loads_strict(text.encode()) == json.loads(text)


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity"])
def test_non_finite_literals_are_refused_at_their_path(literal: str) -> None:
    # RFC 8259 section 6: "Numeric values that cannot be represented ... (such
    # as Infinity and NaN) are not permitted."
    with pytest.raises(InvalidInputError) as error:
        loads_strict(f'{{"records": [{{"x": 1}}, {{"x": {literal}}}], "y": {literal}}}'.encode())
    assert set(error.value.errors or {}) == {"records.1.x", "y"}


def test_depth_is_counted_outside_strings_only() -> None:
    assert not nesting_depth_exceeds(b"[" * MAX_DEPTH + b"]" * MAX_DEPTH)
    assert nesting_depth_exceeds(b"[" * (MAX_DEPTH + 1) + b"]" * (MAX_DEPTH + 1))
    assert not nesting_depth_exceeds(b'{"a": "' + b"[" * 500 + b'"}')
    assert not nesting_depth_exceeds(b'["\\"[[[[", {"k": []}]')
    with pytest.raises(MalformedError):
        loads_strict(b"[" * 100_000 + b"]" * 100_000)


@pytest.mark.parametrize("body", [b"", b"{", b"[1,]", b"{'a': 1}", b"\xff\xfe", b"1 2"])
def test_broken_json_is_malformed(body: bytes) -> None:
    with pytest.raises(MalformedError):
        loads_strict(body)


def test_media_types() -> None:
    require_json("application/json", None)
    require_json("application/merge-patch+json", "utf-8")
    for mimetype, charset in [("text/plain", None), ("", None),
                              ("application/json", "latin-1")]:
        with pytest.raises(UnsupportedMediaError):
            require_json(mimetype, charset)


def test_configuration_defaults_environment_and_overrides() -> None:
    assert load_config(environ={}) == DEFAULTS
    assert DEFAULTS["KEELSON_MAX_BODY_BYTES"] == 16 * 1024 * 1024
    assert DEFAULTS["KEELSON_MAX_RECORDS_PER_REQUEST"] == 10_000
    assert DEFAULTS["KEELSON_MAX_PREDICTION_BATCH"] == 1_000
    assert DEFAULTS["KEELSON_DATABASE_URL"] == "sqlite:///keelson.db"
    config = load_config(
        {"KEELSON_MAX_PREDICTION_BATCH": 5},
        environ={"KEELSON_DATABASE_URL": "postgresql+psycopg://db/k",
                 "KEELSON_MAX_RECORDS_PER_REQUEST": "20",
                 "KEELSON_ACTIVE_STALENESS_SECONDS": "0.5",
                 "KEELSON_ADMIN_TOKEN": ""},
    )
    assert config["KEELSON_DATABASE_URL"] == "postgresql+psycopg://db/k"
    assert config["KEELSON_MAX_RECORDS_PER_REQUEST"] == 20
    assert config["KEELSON_ACTIVE_STALENESS_SECONDS"] == 0.5
    assert config["KEELSON_MAX_PREDICTION_BATCH"] == 5
    assert config["KEELSON_ADMIN_TOKEN"] is None


@pytest.mark.parametrize("env", [{"KEELSON_MAX_BODY_BYTES": "lots"},
                                 {"KEELSON_MAX_RECORDS_PER_REQUEST": "0"}])
def test_unusable_settings_are_refused(env: dict[str, str]) -> None:
    with pytest.raises(ConfigError):
        load_config(environ=env)


def _depth(value: object) -> int:
    if isinstance(value, dict):
        return 1 + max(map(_depth, value.values()), default=0)
    if isinstance(value, list):
        return 1 + max(map(_depth, value), default=0)
    return 0


tricky_text = st.text(alphabet='[]{}"\\\\ab\n\u00e9', max_size=6)
nested = st.recursive(
    st.one_of(st.none(), st.integers(), tricky_text),
    lambda inner: st.one_of(st.lists(inner, max_size=3),
                            st.dictionaries(tricky_text, inner, max_size=3)),
    max_leaves=30,
)


@settings(max_examples=400, deadline=None)
@given(value=nested, limit=st.integers(min_value=0, max_value=6), ascii_only=st.booleans())
def test_the_depth_check_matches_the_true_depth(value: object, limit: int,
                                                ascii_only: bool) -> None:
    data = json.dumps(value, ensure_ascii=ascii_only).encode()
    assert nesting_depth_exceeds(data, limit) == (_depth(value) > limit)


def test_a_retired_setting_is_named_with_what_replaced_it(caplog: pytest.LogCaptureFixture
                                                          ) -> None:
    from service.config import warn_of_retired

    with caplog.at_level(logging.WARNING, logger="keelson"):
        said = warn_of_retired({"KEELSON_VERSION_CACHE_SIZE": "32"})
    assert said == [line.getMessage() for line in caplog.records]
    assert len(said) == 1 and said[0].startswith(
        "KEELSON_VERSION_CACHE_SIZE is no longer read; set KEELSON_VERSION_CACHE_MIB")
    assert warn_of_retired({"KEELSON_VERSION_CACHE_SIZE": " "}) == []  # blank is unset
    assert warn_of_retired({}) == []
