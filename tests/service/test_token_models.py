"""Tokens limited to models (issue 12, section 9), over the app's own URL map and
the scope table of docs/http-api.md (tests/contract.py), so a route added later
is covered here or fails here: a limited token reaches its own models and gets,
for every other model, the answer a model that does not exist gets, and
changes nothing. Our own contract; no outside source."""

from __future__ import annotations

import re
from typing import Any

from flask import Flask
from sqlalchemy import select

from service.store.tables import Base
from service.web.extensions import get_database, get_drift_tally
from tests.contract import NO_TOKEN, route_key
from tests.service.drift_setup import predict_query
from tests.service.helpers import ADMIN_TOKEN, ApiClient, create_model, ingest_raw, model_spec
from tests.service.predictions_factory import (
    add_version,
    pump_rows,
    pump_rule,
    stored_spec,
    train_learner,
)
from tests.service.test_auth import app_routes, routes

OWN, OTHER, ABSENT = "pump-risk", "booster-risk", "lift-risk"
ROWS = pump_rows(60, seed=3)


def request_for(method: str, rule: str, model: str, job: int) -> tuple[str, Any]:
    """The path and body of a request the route answers 2xx for ``model`` with
    an unlimited token: a refusal of it is the limit, not a bad request. A new
    route with a model in its path needs its line here (KeyError otherwise)."""
    row = ROWS[0]
    bodies: dict[tuple[str, str], Any] = {
        ("GET", "/v1/models/{}"): None,
        ("DELETE", "/v1/models/{}"): None,
        ("GET", "/v1/models/{}/schema"): None,
        ("POST", "/v1/models/{}/records"): {"records": [
            {"key": "r-new", "features": row, "label": pump_rule(row)}]},
        ("GET", "/v1/models/{}/records"): None,
        ("POST", "/v1/models/{}/records/forget"): {"keys": ["r-0"], "reason": "asked to"},
        ("POST", "/v1/models/{}/outcomes"): {"outcomes": [{"key": "case-0", "label": "ok"}]},
        ("GET", "/v1/models/{}/versions"): None,
        ("GET", "/v1/models/{}/versions/{}"): None,
        ("POST", "/v1/models/{}/versions/{}/promote"): {},
        ("GET", "/v1/models/{}/versions/{}/export"): None,
        ("GET", "/v1/models/{}/predictions"): None,
        ("POST", "/v1/models/{}/predictions"): {"explain": "none",
                                                "records": [{"features": row}]},
        ("POST", "/v1/models/{}/sweeps"): {"features": row},
        ("GET", "/v1/models/{}/track-record"): None,
        ("GET", "/v1/models/{}/drift"): None,
        ("POST", "/v1/models/{}/retrain"): {},
        ("GET", "/v1/models/{}/history"): None,
        ("PATCH", "/v1/models/{}"): {"training": {"learning_rate": 0.005}},
        ("POST", "/v1/models/{}/pause"): {"reason": "maintenance"},
        ("POST", "/v1/models/{}/resume"): {},
        ("GET", "/v1/jobs/{}"): None,
    }
    body = bodies[route_key(method, rule)]
    values = {"name": model, "number": "2", "job_id": str(job)}
    path = re.sub(r"<(?:[^:<>]+:)?([^<>]+)>", lambda m: values[m.group(1)], rule)
    if path.endswith("/predictions") and method == "GET":
        path += "?" + predict_query(row)
    if path.endswith("/export"):
        path += "?format=onnx"
    if method == "DELETE":
        path += f"?confirm={model}"
    return path, body


def is_page_rule(rule: str) -> bool:
    """A page takes a session, not a bearer token: its model limits are
    tests/service/test_pages.py's."""
    return not rule.startswith("/v1/")


def pump_model(api: ApiClient, name: str) -> int:
    """A pump model with records, an active version 1 that learned them, a
    candidate version 2, a scored case ``case-0`` and a retrain job (its id)."""
    create_model(api, name=name)
    ingest_raw(get_database(api.app).write, name,
               [{"key": f"r-{i}", "features": row, "label": pump_rule(row)}
                for i, row in enumerate(ROWS)])
    learner = train_learner(stored_spec(api.app, name), ROWS, pump_rule, passes=1)
    add_version(api.app, name, learner.to_bytes(), records_seen=len(ROWS))
    add_version(api.app, name, learner.to_bytes(), activate=False, records_seen=len(ROWS))
    api.request("POST", f"/v1/models/{name}/predictions", 200, json_body={
        "explain": "none", "records": [{"key": "case-0", "features": ROWS[1]}]})
    job: int = api.request("POST", f"/v1/models/{name}/retrain", 202)["job"]["id"]
    return job


def everything(app: Flask) -> dict[str, list[Any]]:
    """Every row of every table, in primary-key order (drift counts flushed first)."""
    tally = get_drift_tally(app)
    if tally is not None:
        tally.flush()
    with get_database(app).read() as session:
        return {table.name: [tuple(row) for row in session.execute(
                    select(table).order_by(*table.primary_key.columns))]
                for table in Base.metadata.sorted_tables}


def answer(api: ApiClient, method: str, path: str, body: Any, token: str) -> Any:
    response = api.client.open(path, method=method, json=body,
                               headers={"Authorization": f"Bearer {token}"})
    # Every header but those that differ per answer anyway (the length follows
    # the body, which is compared).
    headers = sorted((k, v) for k, v in response.headers.items()
                     if k not in ("Date", "X-Request-Id", "Content-Length"))
    return response.status_code, response.get_json(), headers


def test_a_limited_token_reaches_its_models_and_no_other(any_api: ApiClient) -> None:
    api = any_api
    own_job, other_job = pump_model(api, OWN), pump_model(api, OTHER)
    token = api.token("admin", name="scada-bridge", models=[OWN])
    # admin passes every scope check, so only the model limit can refuse;
    # lower scopes are the auth matrix's (tests/service/test_auth.py).
    before = everything(api.app)
    checked = 0
    for method, rule, _ in app_routes(api.app):
        if "<model:name>" not in rule and "<int:job_id>" not in rule or is_page_rule(rule):
            continue
        path, body = request_for(method, rule, OTHER, other_job)
        absent_path, _ = request_for(method, rule, ABSENT, 10**6)
        refused = answer(api, method, path, body, token)
        assert refused[0] == 404, (method, path, refused)
        # Word for word, headers and all, what a model (or job) that does not
        # exist gets with an unlimited token, once its name (or id) is swapped.
        absent = answer(api, method, absent_path, body, ADMIN_TOKEN)
        swapped = re.sub(ABSENT, OTHER, str(absent)).replace(str(10**6), str(other_job))
        assert str(refused) == swapped, (method, path)
        checked += 1
    assert everything(api.app) == before  # nothing changed
    assert checked >= 13
    # The delete last: after it, the model is gone for every other route.
    for method, rule, _ in sorted(app_routes(api.app), key=lambda r: r[0] == "DELETE"):
        if "<model:name>" not in rule and "<int:job_id>" not in rule or is_page_rule(rule):
            continue
        path, body = request_for(method, rule, OWN, own_job)
        status = answer(api, method, path, body, token)[0]
        assert 200 <= status < 300, (method, path, status, api.client.open(
            path, method=method, json=body,
            headers={"Authorization": f"Bearer {token}"}).get_data(True))


def test_the_model_list_pages_through_its_own_models_only(any_api: ApiClient) -> None:
    api = any_api
    names = ["booster-a", "booster-b", "booster-c", "lift-a", "lift-b"]
    for name in names:
        create_model(api, name=name)
    token = api.token("predict", name="reader", models=["booster-a", "booster-c", "lift-b"])
    seen: list[str] = []
    after: str | None = None
    for _ in range(5):
        query = "?limit=2" + (f"&after={after}" if after else "")
        page = api.request("GET", f"/v1/models{query}", 200, token=token)
        seen += [m["name"] for m in page["models"]]
        after = page["next"]
        if after is None:
            break
    assert seen == ["booster-a", "booster-c", "lift-b"]
    unlimited = api.request("GET", "/v1/models?limit=10", 200)
    assert [m["name"] for m in unlimited["models"]] == names


def test_creating_models_needs_an_unlimited_admin_token(any_api: ApiClient) -> None:
    api = any_api
    create_model(api)
    limited = api.token("admin", name="limited-admin", models=[OWN])
    body = api.request("POST", "/v1/models", 403, token=limited,
                       json_body=model_spec(name="booster-risk"))
    assert body["detail"] == ("This token is limited to models; this route needs a token "
                              "that is not.")
    assert [m["name"] for m in api.request("GET", "/v1/models", 200)["models"]] == [OWN]
    unlimited = api.token("admin", name="full-admin")
    api.request("POST", "/v1/models", 201, token=unlimited,
                json_body=model_spec(name="booster-risk"))


def test_every_route_without_a_model_in_its_path_is_either_filtered_or_refused(
        app: Flask) -> None:
    """Fail closed: a limited token passes a route about no model only where
    the view applies the limits itself; this lists which those are."""
    from service.web.auth import FILTERS_ATTRIBUTE, declared_scope
    filtered = set()
    for rule in app.url_map.iter_rules():
        view = app.view_functions[rule.endpoint]
        if getattr(view, FILTERS_ATTRIBUTE, False):
            assert "<model:name>" not in rule.rule and declared_scope(view) != NO_TOKEN
            filtered.add(rule.rule)
    assert filtered == {"/v1/models", "/v1/jobs/<int:job_id>"}
    # Every other route about no model that needs a token refuses a limited
    # admin token, and changes nothing (today: model creation alone).
    api = ApiClient(app)
    create_model(api)
    token = api.token("admin", name="limited-admin", models=[OWN])
    before = everything(app)
    refused = []
    for method, path, scope in routes(app):
        if scope == NO_TOKEN or "/v1/models/" in path or path in (
                "/v1/models", "/v1/jobs/1") and method == "GET":
            continue
        response = api.client.open(path, method=method, json=model_spec(name=OTHER),
                                   headers={"Authorization": f"Bearer {token}"})
        assert response.status_code == 403, (method, path)
        refused.append((method, path))
    assert everything(app) == before
    assert refused == [("POST", "/v1/models")]


def test_limits_apply_whatever_the_scope(api: ApiClient) -> None:
    """A limited ingest token gets 404 for another model even on a route it
    lacks the scope for (before the scope is checked: nothing to learn there)."""
    create_model(api)
    create_model(api, name=OTHER)
    token = api.token("ingest", name="scada-bridge", models=[OWN])
    api.request("GET", f"/v1/models/{OTHER}", 404, token=token)
    api.request("GET", f"/v1/models/{OWN}", 403, token=token)
    api.request("POST", f"/v1/models/{OWN}/records", 201, token=token, json_body={
        "records": [{"features": ROWS[0], "label": pump_rule(ROWS[0])}]})



def test_a_warm_limited_token_costs_no_query_of_its_own(api: ApiClient) -> None:
    """The limit rides in the token cache: after the first request, a refused
    other model is answered without touching the database (common practice,
    no source: the cache's own contract, docs/http-api.md)."""
    from sqlalchemy import event
    create_model(api)
    create_model(api, name=OTHER)
    token = api.token("predict", name="reader", models=[OWN])
    api.request("GET", f"/v1/models/{OWN}", 200, token=token)  # warms the token cache
    statements: list[str] = []
    engine = get_database(api.app).engine
    listener = lambda *args: statements.append(args[2])  # noqa: E731
    event.listen(engine, "before_cursor_execute", listener)
    try:
        for _ in range(20):
            api.request("GET", f"/v1/models/{OTHER}/schema", 404, token=token)
    finally:
        event.remove(engine, "before_cursor_execute", listener)
    assert statements == []


def test_a_limited_token_is_made_only_for_models_that_exist(app: Flask) -> None:
    import pytest

    from service.errors import InvalidInputError
    from service.usecases.tokens import create_token, list_tokens
    db = get_database(app)
    ApiClient(app).request("POST", "/v1/models", 201, json_body=model_spec())
    row, _ = create_token(db, "bridge", ["ingest"], [OWN, OWN])
    assert row.models == [OWN]
    assert create_token(db, "reader", ["predict"])[0].models is None
    for models, message in (([OTHER, OWN], f"There is no model named {OTHER!r}."),
                            (["../etc"], "There is no model named '../etc'."),
                            ([], "A limited token needs at least one model.")):
        with pytest.raises(InvalidInputError) as refused:
            create_token(db, "bad", ["ingest"], models)
        assert refused.value.errors == {"models": [message]}
    assert [t.name for t in list_tokens(db)] == ["bridge", "reader"]
