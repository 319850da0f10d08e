"""DELETE /v1/models/{name}?confirm={name} (issue 12, section 7), the request
side: the name twice, nothing changed on refusal, the model gone at once on
every route of the app's URL map (as a model that never existed), its name
free again, and a repeated delete answered with the same job. The worker's
side (the rows removed) is tests/worker/test_deletion.py. Our own contract;
no outside source."""

from __future__ import annotations

import re

from flask import Flask
from sqlalchemy import select

from service.store.tables import JobRow, ModelRow
from service.web.extensions import get_database
from tests.service.helpers import ADMIN_TOKEN, ApiClient, create_model
from tests.service.test_auth import app_routes
from tests.service.test_token_models import (
    ABSENT,
    OTHER,
    OWN,
    answer,
    everything,
    is_page_rule,
    pump_model,
    request_for,
)


def delete(api: ApiClient, name: str, status: int = 202, confirm: str | None = None) -> dict:
    query = "" if confirm is None else f"?confirm={confirm}"
    return api.request("DELETE", f"/v1/models/{name}{query}", status)  # type: ignore[no-any-return]


def test_a_delete_needs_the_name_twice_and_a_refusal_changes_nothing(any_api: ApiClient) -> None:
    api = any_api
    pump_model(api, OWN)
    before = everything(api.app)
    problem = api.request("DELETE", f"/v1/models/{OWN}", 422)
    assert problem["errors"] == {"query.confirm": ["Missing data for required field."]}
    for query in ["?confirm=", f"?confirm={OTHER}", f"?confirm={OWN.upper()}",
                  f"?confirm={OWN}-", f"?confirm={OWN}&confirm={OTHER}"]:
        problem = api.request("DELETE", f"/v1/models/{OWN}{query}", 422)
        assert problem["type"] == "urn:keelson:problem:invalid-input", query
        assert problem["errors"] == {
            "query.confirm": ["Must be given once, equal to the model's name."]}, query
    problem = api.request("DELETE", f"/v1/models/{OWN}?confirm={OWN}&cascade=1", 422)
    assert problem["errors"] == {"query.cascade": ["Unknown field."]}
    assert everything(api.app) == before
    api.request("GET", f"/v1/models/{OWN}", 200)
    # A model that does not exist: the name twice still comes first (it is
    # checked without the database), then the 404.
    delete(api, ABSENT, 422)
    assert delete(api, ABSENT, 404, confirm=ABSENT)["detail"] == (
        f"There is no model named {ABSENT!r}.")


def test_a_deleted_model_is_gone_at_once_from_every_route(any_api: ApiClient) -> None:
    api = any_api
    own_job, other_job = pump_model(api, OWN), pump_model(api, OTHER)
    body = delete(api, OWN, confirm=OWN)
    job = body["job"]
    assert (job["model"], job["kind"], job["status"], job["progress"]) == (
        OWN, "delete", "queued", None)
    assert api.last.headers["Location"] == f"/v1/jobs/{job['id']}"
    checked = 0
    for method, rule, _ in app_routes(api.app):
        # DELETE is the same job (below); pages take a session, and their 404 for
        # a model that is gone is tests/service/test_pages.py's.
        if "<model:name>" not in rule or method == "DELETE" or is_page_rule(rule):
            continue
        path, request_body = request_for(method, rule, OWN, own_job)
        gone = answer(api, method, path, request_body, ADMIN_TOKEN)
        # Word for word what a model that never existed gets.
        absent_path, _ = request_for(method, rule, ABSENT, own_job)
        absent = answer(api, method, absent_path, request_body, ADMIN_TOKEN)
        assert gone[0] == 404, (method, path, gone)
        assert str(gone) == re.sub(ABSENT, OWN, str(absent)), (method, path)
        checked += 1
    assert checked >= 13
    # The other model serves on, and the list no longer names the deleted one.
    for method, rule, _ in app_routes(api.app):
        if "<model:name>" in rule and method != "DELETE" and not is_page_rule(rule):
            path, request_body = request_for(method, rule, OTHER, other_job)
            status = answer(api, method, path, request_body, ADMIN_TOKEN)[0]
            assert 200 <= status < 300, (method, path, status)
    assert [m["name"] for m in api.request("GET", "/v1/models", 200)["models"]] == [OTHER]
    # Its delete job stays readable under the name it had; its queued retrain ended.
    shown = api.request("GET", f"/v1/jobs/{job['id']}", 200)
    assert (shown["model"], shown["kind"]) == (OWN, "delete")
    retrain = api.request("GET", f"/v1/jobs/{own_job}", 200)
    assert (retrain["model"], retrain["status"], retrain["error"]) == (
        OWN, "failed", "its model was deleted")


def test_deleting_again_answers_with_the_same_job(any_api: ApiClient) -> None:
    api = any_api
    create_model(api, name=OWN)
    first = delete(api, OWN, confirm=OWN)["job"]
    again = delete(api, OWN, confirm=OWN)["job"]
    assert again["id"] == first["id"]
    assert api.last.headers["Location"] == f"/v1/jobs/{first['id']}"
    with get_database(api.app).read() as session:
        jobs = list(session.scalars(select(JobRow).where(JobRow.kind == "delete")))
    assert [j.id for j in jobs] == [first["id"]]
    # Still the 422 without the name twice, even now.
    delete(api, OWN, 422)


def test_a_failed_delete_is_queued_again_by_the_next_delete(any_api: ApiClient) -> None:
    api = any_api
    create_model(api, name=OWN)
    job_id = delete(api, OWN, confirm=OWN)["job"]["id"]
    with get_database(api.app).write() as session:
        row = session.get_one(JobRow, job_id)
        row.status, row.error, row.attempts = "failed", "its worker stopped", 3
        session.commit()
    again = delete(api, OWN, confirm=OWN)["job"]
    assert (again["id"], again["status"], again["error"]) == (job_id, "queued", None)


def test_a_deleted_name_can_be_created_again(any_api: ApiClient, any_app: Flask) -> None:
    api = any_api
    pump_model(api, OWN)
    old = delete(api, OWN, confirm=OWN)["job"]
    created = create_model(api, name=OWN)
    assert created["records"]["total"] == 0 and created["active_version"] is None
    api.request("GET", f"/v1/models/{OWN}", 200)
    api.request("GET", f"/v1/models/{OWN}/versions", 200)
    assert api.request("GET", f"/v1/models/{OWN}/versions", 200)["versions"] == []
    with get_database(any_app).read() as session:
        rows = session.execute(select(ModelRow.name, ModelRow.deleted_name)
                               .order_by(ModelRow.id)).all()
    assert [tuple(r) for r in rows] == [(f"~{rows[0][0][1:]}", OWN), (OWN, None)]
    # Deleting the new one is a new delete, not the old one's job.
    new = delete(api, OWN, confirm=OWN)["job"]
    assert new["id"] != old["id"]
    assert delete(api, OWN, confirm=OWN)["job"]["id"] == new["id"]
