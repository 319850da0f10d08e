"""A version whose snapshot retention pruned (docs/http-api.md, "Pruned
versions"): listed with its metrics, lineage and ``pruned_at``; predicting
with it, exporting it or promoting it answers 409 with the snapshot-pruned
problem type and changes nothing; a rebuilt snapshot serves again at once.
"""

from __future__ import annotations

import datetime as dt

from flask import Flask
from sqlalchemy import select, update

from service.store.tables import ModelRow, VersionRow
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, create_model
from tests.service.predictions_factory import (
    add_version,
    pump_rows,
    pump_rule,
    stored_spec,
    train_learner,
)

MODEL = "/v1/models/pump-risk"
QUERY = "vibration_rms=72.5&pump_family=screw&has_vfd=false"
PRUNED_AT = dt.datetime(2026, 11, 2, 3, 0, tzinfo=dt.UTC)
PROBLEM = "urn:keelson:problem:snapshot-pruned"


def prune(app: Flask, number: int) -> bytes:
    """Prune version ``number`` as retention does; its snapshot, for putting back."""
    with get_database(app).write() as session:
        row = session.scalars(select(VersionRow).where(VersionRow.number == number)).one()
        snapshot = row.snapshot
        row.snapshot, row.pruned_at = None, PRUNED_AT
        session.commit()
    assert snapshot is not None
    return snapshot


def test_a_pruned_version_is_listed_and_answers_409_until_rebuilt(
        any_api: ApiClient, any_app: Flask) -> None:
    create_model(any_api)
    spec = stored_spec(any_app, "pump-risk")
    learner = train_learner(spec, pump_rows(100, 1), pump_rule, passes=1)
    add_version(any_app, "pump-risk", learner.to_bytes(), activate=True)
    add_version(any_app, "pump-risk", learner.to_bytes(), activate=False)
    snapshot = prune(any_app, 2)

    shown = any_api.request("GET", f"{MODEL}/versions/2", 200)
    assert shown["pruned_at"] == PRUNED_AT.isoformat()
    assert shown["status"] == "candidate"
    assert any_api.request("GET", f"{MODEL}/versions/1", 200)["pruned_at"] is None

    for method, path in (("GET", f"{MODEL}/predictions?{QUERY}&version=2"),
                         ("GET", f"{MODEL}/versions/2/export?format=snapshot"),
                         ("GET", f"{MODEL}/versions/2/export?format=onnx"),
                         ("POST", f"{MODEL}/versions/2/promote")):
        body = any_api.request(method, path, 409)
        assert body["type"] == PROBLEM, path
        assert body["version"] == 2 and body["pruned_at"] == PRUNED_AT.isoformat()
        assert "keelson replay" in body["detail"]
    # The refused promotion changed nothing.
    with get_database(any_app).read() as session:
        active = session.scalar(select(ModelRow.active_version_id))
        statuses = dict(session.execute(select(VersionRow.number, VersionRow.status)).all())
    assert statuses == {1: "active", 2: "candidate"}
    assert active is not None
    assert any_api.request("GET", f"{MODEL}/predictions?{QUERY}", 200)["version"] == 1

    # A replay puts the snapshot back: the version serves at once (a pruned
    # version is never cached as such).
    with get_database(any_app).write() as session:
        session.execute(update(VersionRow).where(VersionRow.number == 2)
                        .values(snapshot=snapshot, pruned_at=None))
        session.commit()
    assert any_api.request("GET", f"{MODEL}/predictions?{QUERY}&version=2", 200)["version"] == 2
