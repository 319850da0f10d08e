"""A model's delete job (issue 12, section 7), run by a worker: every row of
the deleted model goes, in batches, except its tombstone row, its stopped
trainer row and the delete job itself (readable to the end); the other model
keeps its rows, trains and serves meanwhile. Our own contract; no outside
source."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest
from flask import Flask
from sqlalchemy import func, select

from service.store.tables import Base, JobRow, ModelRow, RecordRow, ScoredCaseRow
from service.web.extensions import close_drift_tally, get_database
from tests.service.conftest import build_app
from tests.service.helpers import ApiClient
from tests.service.test_token_models import OTHER, OWN, everything, pump_model
from tests.worker.helpers import caught_up, wait_until, worker_thread


@pytest.fixture
def served(database_url: str) -> Iterator[ApiClient]:
    app = build_app(database_url)
    yield ApiClient(app)
    close_drift_tally(app)
    get_database(app).engine.dispose()


def rows_of(app: Flask, model_id: int) -> dict[str, int]:
    """How many rows each table holds for the model (tables with a model_id)."""
    counts = {}
    with get_database(app).read() as session:
        for table in Base.metadata.sorted_tables:
            column = table.c.get("model_id") if table.name != "models" else table.c.id
            if column is not None:
                counts[table.name] = int(session.scalar(
                    select(func.count()).select_from(table).where(column == model_id)) or 0)
    return counts


def job_of(app: Flask, job_id: int) -> JobRow:
    with get_database(app).read() as session:
        return session.get_one(JobRow, job_id)


def model_id_of(app: Flask, name: str) -> int:
    with get_database(app).read() as session:
        return int(session.scalars(select(ModelRow.id).where(ModelRow.name == name)).one())


def test_the_delete_job_removes_every_row_and_the_other_model_trains_on(
        served: ApiClient, database_url: str) -> None:
    api = served
    pump_model(api, OWN)
    pump_model(api, OTHER)
    for name in (OWN, OTHER):  # a track record: the outcome of the scored case
        api.request("POST", f"/v1/models/{name}/outcomes", 201,
                    json_body={"outcomes": [{"key": "case-0", "label": "ok"}]})
    everything(api.app)  # flushes the drift counts
    own_id, other_id = model_id_of(api.app, OWN), model_id_of(api.app, OTHER)
    before = rows_of(api.app, own_id)
    assert all(before[t] for t in ("records", "versions", "scored_cases", "jobs",
                                   "track_record_days", "track_record_alarms",
                                   "drift_tallies")), before
    with get_database(api.app).read() as session:
        other_records = list(session.execute(select(RecordRow.seq, RecordRow.key).where(
            RecordRow.model_id == other_id).order_by(RecordRow.seq)))
    job_id = api.request("DELETE", f"/v1/models/{OWN}?confirm={OWN}", 202)["job"]["id"]
    with worker_thread(database_url, KEELSON_WORKER_DELETE_BATCH="7"):
        wait_until(lambda: job_of(api.app, job_id).status == "succeeded", timeout=120)
        # Records sent to the other model meanwhile are learned.
        api.request("POST", f"/v1/models/{OTHER}/records", 201, json_body={"records": [
            {"key": "late", "features": {"vibration_rms": 3.0, "pump_family": "screw",
                                         "has_vfd": True}, "label": "ok"}]})
        wait_until(lambda: caught_up(get_database(api.app), other_id), timeout=120)
    assert rows_of(api.app, own_id) == {
        **{table: 0 for table in before}, "models": 1, "trainers": 1, "jobs": 1}
    job = api.request("GET", f"/v1/jobs/{job_id}", 200)
    assert (job["model"], job["kind"], job["status"], job["error"]) == (
        OWN, "delete", "succeeded", None)
    progress: dict[str, Any] = job["progress"]
    assert progress["step"] == "done"
    assert progress["records_total"] == progress["records_deleted"] == before["records"]
    assert progress["deleted"]["records"] == before["records"]
    assert progress["deleted"]["versions"] == before["versions"]
    with get_database(api.app).read() as session:
        assert list(session.execute(select(RecordRow.seq, RecordRow.key).where(
            RecordRow.model_id == other_id, RecordRow.key != "late").order_by(
            RecordRow.seq))) == other_records
        assert session.scalar(select(func.count()).select_from(ScoredCaseRow).where(
            ScoredCaseRow.model_id == other_id)) == 1
    api.request("GET", f"/v1/models/{OTHER}/predictions?vibration_rms=3.0&pump_family=screw"
                "&has_vfd=true", 200)
    api.request("GET", f"/v1/models/{OWN}", 404)
