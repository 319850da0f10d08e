"""Plain helpers for service tests: a request helper that asserts the status,
factories with overrides, and direct database reads."""

from __future__ import annotations

import copy
import json
from typing import Any

from flask import Flask
from sqlalchemy import func, select
from sqlalchemy.orm import Session, sessionmaker

from service.store.tables import ModelRow, RecordRow, VersionRow
from service.usecases.common import find_model
from service.usecases.records import CheckedRecords, IngestResult, ingest_records
from service.usecases.tokens import create_token
from service.web.extensions import get_database
from service.web.schemas.rules import rules_for

ADMIN_TOKEN = "test-admin-token"
PROBLEM = "application/problem+json"

PUMP_SPEC: dict[str, Any] = {
    "name": "pump-risk",
    "task": "binary",
    "target": "failed_within_30d",
    "classes": ["ok", "failed"],
    "features": [
        {"name": "vibration_rms", "type": "numeric", "min": 0, "max": 100, "unit": "mm/s"},
        {"name": "pump_family", "type": "categorical", "levels": ["centrifugal", "screw"]},
        {"name": "has_vfd", "type": "boolean"},
    ],
}


class ApiClient:
    """``api.request("GET", "/v1/models", 200)`` -> the parsed body."""

    def __init__(self, app: Flask) -> None:
        self.app = app
        self.client = app.test_client()

    def request(
        self,
        method: str,
        path: str,
        status: int,
        *,
        token: str | None = ADMIN_TOKEN,
        json_body: Any = None,
        data: bytes | str | None = None,
        content_type: str | None = None,
        headers: dict[str, str] | None = None,
    ) -> Any:
        sent = dict(headers or {})
        if token is not None:
            sent["Authorization"] = f"Bearer {token}"
        if json_body is not None:
            data = json.dumps(json_body)
            content_type = content_type or "application/json"
        response = self.client.open(
            path, method=method, data=data, content_type=content_type, headers=sent
        )
        self.last = response
        assert response.status_code == status, (response.status_code, response.get_data(True))
        if status >= 400:
            assert response.mimetype == PROBLEM, response.mimetype
        if not response.data:
            return None
        return json.loads(response.data)

    def token(self, *scopes: str, name: str = "test", models: list[str] | None = None) -> str:
        _row, plaintext = create_token(get_database(self.app), name, scopes, models)
        return plaintext


def model_spec(**overrides: Any) -> dict[str, Any]:
    spec = copy.deepcopy(PUMP_SPEC)
    spec.update(overrides)
    return spec


def create_model(api: ApiClient, **overrides: Any) -> Any:
    return api.request("POST", "/v1/models", 201, json_body=model_spec(**overrides))


def record(i: int, *, key: str | None = None, **features: Any) -> dict[str, Any]:
    row: dict[str, Any] = {
        "features": {
            "vibration_rms": float(i % 50),
            "pump_family": "screw" if i % 2 else "centrifugal",
            "has_vfd": bool(i % 3),
            **features,
        },
        "label": "failed" if i % 4 == 0 else "ok",
    }
    if key is not None:
        row["key"] = key
    return row


def check_records(session: Session, name: str, records: list[Any]) -> CheckedRecords:
    """Records of the JSON shape checked by the model's rules, as the API checks them."""
    model = find_model(session, name)
    return CheckedRecords(model.id, model.spec, rules_for(model.spec).load_records(records))


def ingest_raw(sessions: sessionmaker[Session] | Session, name: str,
               records: list[Any]) -> IngestResult:
    """Check ``records`` and store them through the ingest use case (what the API does)."""
    if isinstance(sessions, sessionmaker):
        with sessions() as session:
            checked = check_records(session, name, records)
    else:
        checked = check_records(sessions, name, records)
    return ingest_records(sessions, name, checked)


def count_records(app: Flask, model: str | None = None) -> int:
    with get_database(app).read() as session:
        query = select(func.count()).select_from(RecordRow)
        if model is not None:
            query = query.join(ModelRow).where(ModelRow.name == model)
        return int(session.scalar(query) or 0)


def model_row(app: Flask, name: str) -> ModelRow:
    with get_database(app).read() as session:
        row = session.scalars(select(ModelRow).where(ModelRow.name == name)).one()
        session.expunge(row)
        return row


def add_version(
    app: Flask,
    model: str,
    number: int,
    *,
    status: str = "candidate",
    origin: str = "online",
    parent: int | None = None,
    cursor: int = 0,
    records_seen: int = 0,
    metrics: dict[str, Any] | None = None,
    active: bool = False,
) -> int:
    """Insert a version row as the worker would (the snapshot is not read here)."""
    with get_database(app).write() as session:
        model_id = session.scalars(select(ModelRow.id).where(ModelRow.name == model)).one()
        parent_id = None
        if parent is not None:
            parent_id = session.scalars(select(VersionRow.id).where(
                VersionRow.model_id == model_id, VersionRow.number == parent)).one()
        row = VersionRow(
            model_id=model_id, number=number, origin=origin, status=status,
            snapshot=b"not read by these routes", cursor=cursor, records_seen=records_seen,
            metrics=metrics or {}, parent_id=parent_id,
        )
        session.add(row)
        session.flush()
        if active:
            session.get_one(ModelRow, model_id).active_version_id = row.id
        session.commit()
        return row.id
