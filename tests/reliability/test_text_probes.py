"""Probes: a lone surrogate in every place the API takes text.

The JSON cases are generated, not listed: each request body below is taken
apart, and every member name and every value in it is replaced in turn by text
holding a lone surrogate (escaped ``\\ud800``, the only way JSON text can carry
one: RFC 8259 section 8.2, refused after RFC 7493 section 2.1). Each must be a
422 naming exactly that place, with nothing stored. CSV headers and cells,
query parameter names and values and path segments carry the bytes UTF-8
would spell U+D800 with (``ED A0 80``, not UTF-8: RFC 3629 section 3): a 400.
Every answer is problem details that decodes as strict UTF-8.
"""

from __future__ import annotations

import copy
import json
from collections.abc import Iterator
from typing import Any

import pytest

from service.text import NOT_SCALAR_TEXT
from tests.service.helpers import ApiClient, create_model, model_spec, record

LONE = "\ud800"
SHOWN = "\\ud800"
NOT_UTF8 = b"\xed\xa0\x80"  # U+D800 as UTF-8 would spell it; no UTF-8 decoder takes it

SPEC = model_spec(hidden_layers=[4], activation="tanh", loss="cross_entropy",
                  promotion="manual", training={"optimizer": "sgd", "lr_schedule": "constant",
                                                "learning_rate": 0.01})
BODIES: dict[str, tuple[str, Any]] = {
    "model spec": ("/v1/models", SPEC),
    "records": ("/v1/models/pump-risk/records", {"records": [record(1, key="pump-7")]}),
    "predictions": ("/v1/models/pump-risk/predictions",
                    {"records": [{"features": record(1)["features"]}], "explain": "none"}),
    "retrain": ("/v1/models/pump-risk/retrain", {"warm_start": False}),
}


def places(value: Any, path: tuple[Any, ...] = ()) -> Iterator[tuple[tuple[Any, ...], str]]:
    """Every place of ``value``: (path to it, "value" or "name"), leaves and
    member names alike."""
    if isinstance(value, dict):
        for key, item in value.items():
            yield (*path, key), "name"
            yield from places(item, (*path, key))
    elif isinstance(value, list):
        for index, item in enumerate(value):
            yield from places(item, (*path, index))
    if path and not isinstance(value, dict | list):
        yield path, "value"


def broken(body: Any, path: tuple[Any, ...], what: str) -> tuple[Any, str]:
    """``body`` with a lone surrogate at ``path``, and the path the answer names."""
    changed = copy.deepcopy(body)
    parent = changed
    for step in path[:-1]:
        parent = parent[step]
    last = path[-1]
    named = [str(step) for step in path]
    if what == "name":
        parent[f"{last}{LONE}"] = parent.pop(last)
        named[-1] = f"{last}{SHOWN}"
    else:
        old = parent[last]
        parent[last] = f"{old}{LONE}" if isinstance(old, str) else LONE
    return changed, ".".join(named)


CASES = [(name, path, what) for name, (_, body) in BODIES.items()
         for path, what in places(body)]


def strict_problem(api: ApiClient, status: int) -> dict[str, Any]:
    """The last answer: problem details, strict UTF-8 JSON, of ``status``."""
    response = api.last
    assert response.status_code == status and response.mimetype == "application/problem+json"
    parsed: dict[str, Any] = json.loads(response.get_data().decode("utf-8", "strict"))
    return parsed


def models(api: ApiClient) -> list[str]:
    return [m["name"] for m in api.request("GET", "/v1/models", 200)["models"]]


def test_the_probes_reach_every_kind_of_place() -> None:
    where = {(name, what) for name, _, what in CASES}
    assert where == {(name, what) for name in BODIES for what in ("name", "value")}
    assert len(CASES) > 60  # every name and value of four bodies


@pytest.mark.parametrize(("body_name", "path", "what"), CASES,
                         ids=[f"{n}:{'.'.join(map(str, p))}:{w}" for n, p, w in CASES])
def test_a_lone_surrogate_anywhere_in_a_json_body_is_a_422_naming_it(
        any_api: ApiClient, body_name: str, path: tuple[Any, ...], what: str) -> None:
    if body_name != "model spec":
        create_model(any_api)
    target, body = BODIES[body_name]
    changed, named = broken(body, path, what)
    any_api.request("POST", target, 422, data=json.dumps(changed),
                    content_type="application/json")
    problem = strict_problem(any_api, 422)
    assert problem["errors"] == {named: [NOT_SCALAR_TEXT]}, problem
    assert models(any_api) == ([] if body_name == "model spec" else ["pump-risk"])
    counts = any_api.request("GET", "/v1/models", 200)["models"]
    assert all(m["records"]["total"] == 0 for m in counts)


CSV_HEADER = "key,vibration_rms,pump_family,has_vfd,failed_within_30d"
CSV_ROW = "pump-7,12.5,screw,true,ok"


def csv_cases() -> Iterator[tuple[str, bytes]]:
    """Each header name and each cell of a valid CSV, in turn ending in ``ED A0 80``."""
    for line, text in (("header", CSV_HEADER), ("row", CSV_ROW)):
        for column, cell in enumerate(text.split(",")):
            cells = text.split(",")
            cells[column] = cell + "|"  # "|" marks where the bytes go
            changed = ",".join(cells)
            lines = [changed, CSV_ROW] if line == "header" else [CSV_HEADER, changed]
            yield f"{line}:{cell}", ("\n".join(lines) + "\n").encode().replace(b"|", NOT_UTF8)


@pytest.mark.parametrize(("where", "data"), list(csv_cases()),
                         ids=[where for where, _ in csv_cases()])
def test_a_csv_header_or_cell_that_is_not_utf8_is_a_400(any_api: ApiClient, where: str,
                                                       data: bytes) -> None:
    create_model(any_api)
    any_api.request("POST", "/v1/models/pump-risk/records", 400, data=data,
                    content_type="text/csv")
    problem = strict_problem(any_api, 400)
    assert "not UTF-8" in problem["detail"] and "codec" not in problem["detail"]
    assert any_api.request("GET", "/v1/models/pump-risk", 200)["records"]["total"] == 0


QUERY = {"vibration_rms": "12.5", "pump_family": "screw", "has_vfd": "true", "explain": "none"}


def query_cases() -> Iterator[tuple[str, str]]:
    for name in QUERY:
        for what in ("name", "value"):
            parts = [f"{k}={v}" for k, v in QUERY.items() if k != name]
            parts.append(f"{name}%ED%A0%80={QUERY[name]}" if what == "name"
                         else f"{name}={QUERY[name]}%ED%A0%80")
            yield f"{name}:{what}", "&".join(parts)


PATHS = ["/v1/models/pump-risk%ED%A0%80", "/v1/models/pump-risk%ED%A0%80/records",
         "/v1/models/pump-risk%ED%A0%80/predictions", "/v1/models/pump-risk%ED%A0%80/versions",
         "/v1/models/pump-risk%ED%A0%80/schema", "/v1/jobs/1%ED%A0%80", "/healthz%ED%A0%80"]


@pytest.mark.parametrize(("where", "query"), list(query_cases()),
                         ids=[where for where, _ in query_cases()])
def test_a_query_parameter_that_is_not_utf8_is_a_400(api: ApiClient, where: str,
                                                    query: str) -> None:
    create_model(api)
    api.request("GET", f"/v1/models/pump-risk/predictions?{query}", 400)
    assert "UTF-8" in strict_problem(api, 400)["detail"]


@pytest.mark.parametrize("path", PATHS)
def test_a_path_that_is_not_utf8_is_a_400(api: ApiClient, path: str) -> None:
    create_model(api)
    api.request("GET", path, 400)
    assert "UTF-8" in strict_problem(api, 400)["detail"]
