"""Helpers of the outcome tests: scored cases made over HTTP, and what the
database holds of records and cases (to show a refused batch changed nothing)."""

from __future__ import annotations

from typing import Any

from flask import Flask
from sqlalchemy import select

from service.store.tables import ModelRow, RecordRow, ScoredCaseRow
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, create_model
from tests.service.predictions_factory import numeric_rows, pump_rows
from tests.service.test_predictions_api import pump_version

PREDICT = "/v1/models/pump-risk/predictions"
OUTCOMES = "/v1/models/pump-risk/outcomes"
FLOW_OUTCOMES = "/v1/models/flow/outcomes"


def scored_pumps(api: ApiClient, n: int, *, prefix: str = "st") -> list[dict[str, Any]]:
    """A pump model with an active version and ``n`` cases scored with keys
    ``{prefix}-0`` ...; the answers' results, in order."""
    create_model(api)
    pump_version(api)
    rows = pump_rows(n, seed=7)
    body = api.request("POST", PREDICT, 200, json_body={"explain": "none", "records": [
        {"key": f"{prefix}-{i}", "features": row} for i, row in enumerate(rows)]})
    return list(body["results"])


def flow_model(api: ApiClient) -> None:
    """A regression model (``a``, ``b`` -> ``litres``) with one scored case ``f-0``."""
    from engine import Learner
    from tests.service.predictions_factory import add_version, stored_spec
    create_model(api, name="flow", task="regression", target="litres", classes=None,
                 features=[{"name": "a", "type": "numeric"}, {"name": "b", "type": "numeric"}])
    rows = numeric_rows(50)
    learner = Learner.create(stored_spec(api.app, "flow"), warmup=rows,
                             warmup_labels=[r["a"] - r["b"] for r in rows])
    add_version(api.app, "flow", learner.to_bytes())
    api.request("POST", "/v1/models/flow/predictions", 200, json_body={
        "explain": "none", "records": [{"key": "f-0", "features": rows[0]}]})


def stored_state(app: Flask) -> tuple[Any, ...]:
    """Every record, every case's outcome and every model's counters."""
    with get_database(app).read() as session:
        records = session.execute(select(
            RecordRow.seq, RecordRow.key, RecordRow.features, RecordRow.label,
            RecordRow.split).order_by(RecordRow.seq)).all()
        cases = session.execute(select(
            ScoredCaseRow.key, ScoredCaseRow.outcome, ScoredCaseRow.outcome_at
        ).order_by(ScoredCaseRow.key)).all()
        counters = session.execute(select(
            ModelRow.name, ModelRow.records_train, ModelRow.records_holdout)).all()
    return tuple(records), tuple(cases), tuple(counters)
