"""GET /v1/models and GET /v1/models/{name}/versions answer a page at a time:
``limit`` items (100 by default, at most 1,000) after the cursor ``after``, and
``next``, the cursor of the following page (null on the last). Anything else in
the query is refused (422). Our own contract (docs/http-api.md, "Pages"), no
outside source."""

from __future__ import annotations

import json
from typing import Any

import pytest
from flask import Flask

from service.config import DEFAULTS
from service.usecases.model_limits import ModelLimits
from service.usecases.models import create_model as store_model
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, add_version, create_model, model_spec

VERSIONS = "/v1/models/pump-risk/versions"


def store_models(app: Flask, names: list[str]) -> None:
    limits = ModelLimits.from_config(DEFAULTS)
    for name in names:
        store_model(get_database(app), model_spec(name=name), limits)


def walk(api: ApiClient, path: str, key: str, limit: int) -> list[dict[str, Any]]:
    """Every item, following ``next`` from the first page."""
    items: list[dict[str, Any]] = []
    query = f"?limit={limit}"
    while True:
        page = api.request("GET", path + query, 200)
        assert len(page[key]) <= limit
        items += page[key]
        if page["next"] is None:
            return items
        query = f"?limit={limit}&after={page['next']}"


def test_models_are_paged_by_name_and_next_ends_at_null(
        any_api: ApiClient, any_app: Flask) -> None:
    names = [f"station-{i:02d}" for i in range(7)]
    store_models(any_app, names[::-1])
    first = any_api.request("GET", "/v1/models?limit=3", 200)
    assert [m["name"] for m in first["models"]] == names[:3] and first["next"] == names[2]
    last = any_api.request("GET", f"/v1/models?limit=3&after={names[5]}", 200)
    assert [m["name"] for m in last["models"]] == names[6:] and last["next"] is None
    # A page that ends exactly at the last model says so.
    exact = any_api.request("GET", f"/v1/models?limit=4&after={names[2]}", 200)
    assert [m["name"] for m in exact["models"]] == names[3:] and exact["next"] is None
    assert [m["name"] for m in walk(any_api, "/v1/models", "models", 2)] == names
    # A model added before the cursor is not seen again, nor one skipped.
    store_models(any_app, ["aa-first"])
    after = any_api.request("GET", f"/v1/models?limit=3&after={names[2]}", 200)
    assert [m["name"] for m in after["models"]] == names[3:6]


def test_the_default_page_bounds_the_answer(api: ApiClient, app: Flask) -> None:
    store_models(app, [f"station-{i:03d}" for i in range(101)])
    one = len(json.dumps(api.request("GET", "/v1/models?limit=1", 200)))
    page = api.request("GET", "/v1/models", 200)
    assert len(page["models"]) == 100 and page["next"] == "station-099"
    assert len(api.last.data) <= 100 * one
    rest = api.request("GET", "/v1/models?after=station-099", 200)
    assert [m["name"] for m in rest["models"]] == ["station-100"] and rest["next"] is None
    assert len(api.request("GET", "/v1/models?limit=1000", 200)["models"]) == 101


@pytest.mark.parametrize(("query", "field"), [
    ("limit=0", "query.limit"), ("limit=1001", "query.limit"), ("limit=ten", "query.limit"),
    ("limit=2.5", "query.limit"), ("after=Not_A_Name", "query.after"),
    ("page=2", "query.page"), ("offset=100", "query.offset"), ("per_page=5", "query.per_page"),
])
def test_a_paging_query_the_api_does_not_know_is_refused(
        api: ApiClient, query: str, field: str) -> None:
    create_model(api)
    body = api.request("GET", f"/v1/models?{query}", 422)
    assert list(body["errors"]) == [field]


def test_versions_are_paged_by_number_oldest_first(
        any_api: ApiClient, any_app: Flask) -> None:
    create_model(any_api)
    for number in range(1, 6):
        add_version(any_app, "pump-risk", number, cursor=10 * number)
    first = any_api.request("GET", f"{VERSIONS}?limit=2", 200)
    assert [v["number"] for v in first["versions"]] == [1, 2] and first["next"] == 2
    last = any_api.request("GET", f"{VERSIONS}?limit=2&after=4", 200)
    assert [v["number"] for v in last["versions"]] == [5] and last["next"] is None
    assert [v["number"] for v in walk(any_api, VERSIONS, "versions", 2)] == [1, 2, 3, 4, 5]
    assert any_api.request("GET", VERSIONS, 200)["next"] is None


@pytest.mark.parametrize(("query", "field"), [
    ("limit=0", "query.limit"), ("limit=1001", "query.limit"), ("after=-1", "query.after"),
    ("after=two", "query.after"), ("page=2", "query.page"),
])
def test_a_versions_query_the_api_does_not_know_is_refused(
        api: ApiClient, query: str, field: str) -> None:
    create_model(api)
    body = api.request("GET", f"{VERSIONS}?{query}", 422)
    assert list(body["errors"]) == [field]


def test_the_document_states_the_paging_parameters(api: ApiClient) -> None:
    paths = api.request("GET", "/openapi.json", 200)["paths"]
    for path in ("/v1/models", "/v1/models/{name}/versions"):
        parameters = {p["name"]: p for p in paths[path]["get"]["parameters"]
                      if p["in"] == "query"}
        assert set(parameters) == {"limit", "after"}
        assert parameters["limit"]["schema"]["maximum"] == 1000
        assert parameters["limit"]["schema"]["default"] == 100
