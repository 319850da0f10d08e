"""POST /v1/models/{name}/retrain and GET /v1/jobs/{id}."""

from __future__ import annotations

from flask import Flask
from sqlalchemy import select

from service.store.tables import JobRow
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, add_version, create_model

RETRAIN = "/v1/models/pump-risk/retrain"


def jobs(app: Flask) -> list[JobRow]:
    with get_database(app).read() as session:
        return list(session.scalars(select(JobRow).order_by(JobRow.id)))


def test_a_retrain_is_queued_with_a_location(any_api: ApiClient, any_app: Flask) -> None:
    create_model(any_api)
    body = any_api.request("POST", RETRAIN, 202, json_body={"warm_start": False})
    job = body["job"]
    assert job.pop("created_at").endswith("+00:00")
    [row] = jobs(any_app)
    assert job == {"id": row.id, "model": "pump-risk", "kind": "retrain", "status": "queued",
                   "progress": None, "version": None, "error": None,
                   "started_at": None, "finished_at": None}
    assert any_api.last.headers["Location"] == f"/v1/jobs/{row.id}"
    assert (row.kind, row.status, row.params) == ("retrain", "queued", {"warm_start": False})
    shown = any_api.request("GET", f"/v1/jobs/{row.id}", 200)
    shown.pop("created_at")
    assert shown == job


def test_the_body_may_be_omitted(api: ApiClient, app: Flask) -> None:
    create_model(api)
    api.request("POST", RETRAIN, 202)
    assert [j.params for j in jobs(app)] == [{"warm_start": False}]


def test_a_warm_start_needs_an_active_version(api: ApiClient, app: Flask) -> None:
    create_model(api)
    body = api.request("POST", RETRAIN, 409, json_body={"warm_start": True})
    assert body["detail"] == "Model 'pump-risk' has no active version to warm-start from."
    assert jobs(app) == []
    add_version(app, "pump-risk", 1, status="active", active=True)
    api.request("POST", RETRAIN, 202, json_body={"warm_start": True})
    assert [j.params for j in jobs(app)] == [{"warm_start": True}]


def test_a_finished_job_shows_its_version_number_and_progress(api: ApiClient, app: Flask) -> None:
    create_model(api)
    job_id = api.request("POST", RETRAIN, 202)["job"]["id"]
    version_id = add_version(app, "pump-risk", 4, origin="retrain")
    with get_database(app).write() as session:
        row = session.get_one(JobRow, job_id)
        row.status, row.version_id = "succeeded", version_id
        row.progress = {"epoch": 12, "loss": 0.2}
        session.commit()
    body = api.request("GET", f"/v1/jobs/{job_id}", 200)
    assert (body["status"], body["version"], body["progress"]) == (
        "succeeded", 4, {"epoch": 12, "loss": 0.2})


def test_bad_retrain_requests_queue_nothing(api: ApiClient, app: Flask) -> None:
    create_model(api)
    cases = [
        ({"warm_start": "yes"}, "warm_start"),
        ({"warm_start": 1}, "warm_start"),
        ({"warm_start": None}, "warm_start"),
        ({"cold": True}, "cold"),
    ]
    for body, field in cases:
        problem = api.request("POST", RETRAIN, 422, json_body=body)
        assert field in problem["errors"]
    api.request("POST", RETRAIN, 400, data="{", content_type="application/json")
    api.request("POST", RETRAIN, 422, data='{"warm_start": NaN}', content_type="application/json")
    api.request("POST", RETRAIN, 415, data="warm_start=true", content_type="text/plain")
    api.request("POST", "/v1/models/nope/retrain", 404, json_body={"warm_start": False})
    assert jobs(app) == []


def test_unknown_jobs_are_not_found(api: ApiClient) -> None:
    assert api.request("GET", "/v1/jobs/12345", 404)["detail"] == "There is no job 12345."
    api.request("GET", "/v1/jobs/abc", 404)
