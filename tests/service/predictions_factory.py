"""Versions made without the worker: an ``engine.Learner`` trained in the test on
rows generated from a rule, stored as a version row, optionally made active."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any

import numpy as np
from flask import Flask
from sqlalchemy import select

from engine import Learner
from service.store.tables import ModelRow, VersionRow
from service.web.extensions import get_database

Rule = Callable[[Mapping[str, Any]], Any]


def pump_rows(n: int, seed: int = 0) -> list[dict[str, Any]]:
    """Rows for the pump spec of tests.service.helpers.PUMP_SPEC, drawn at random."""
    rng = np.random.default_rng(seed)
    return [
        {
            "vibration_rms": float(rng.uniform(0, 100)),
            "pump_family": "screw" if rng.random() < 0.5 else "centrifugal",
            "has_vfd": bool(rng.random() < 0.5),
        }
        for _ in range(n)
    ]


def pump_rule(row: Mapping[str, Any]) -> str:
    """A made-up dependence the network can learn: high vibration, worse without a VFD."""
    score = row["vibration_rms"] / 50 + (0.0 if row["has_vfd"] else 0.6)
    score += 0.3 if row["pump_family"] == "screw" else 0.0
    return "failed" if score > 1.3 else "ok"


def numeric_rows(n: int, seed: int = 0) -> list[dict[str, Any]]:
    """Rows for an all-numeric spec with fields ``a`` in [0, 10] and ``b`` in [-5, 5]."""
    rng = np.random.default_rng(seed)
    return [{"a": float(rng.uniform(0, 10)), "b": float(rng.uniform(-5, 5))} for _ in range(n)]


def train_learner(spec: Mapping[str, Any], rows: list[dict[str, Any]], rule: Rule,
                  passes: int = 3) -> Learner:
    """A learner warmed up on ``rows`` and taught ``rule`` online for a few passes."""
    labels = [rule(row) for row in rows]
    learner = Learner.create(spec, warmup=rows, warmup_labels=labels)
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    for _ in range(passes):
        learner.learn(X, Y)
    return learner


def add_version(app: Flask, model: str, snapshot: bytes, *, activate: bool = True,
                records_seen: int = 0) -> int:
    """Store ``snapshot`` as the next version of ``model``; returns its number."""
    with get_database(app).write() as session:
        row = session.scalars(select(ModelRow).where(ModelRow.name == model)).one()
        numbers = session.scalars(select(VersionRow.number).where(VersionRow.model_id == row.id))
        number = max(numbers, default=0) + 1
        version = VersionRow(model_id=row.id, number=number, origin="online",
                             status="active" if activate else "candidate", snapshot=snapshot,
                             cursor=records_seen, records_seen=records_seen, metrics={})
        session.add(version)
        session.flush()
        if activate:
            row.active_version_id = version.id
        session.commit()
        return number


def activate(app: Flask, model: str, number: int) -> None:
    """Point ``model`` at its version ``number`` straight in the database."""
    with get_database(app).write() as session:
        row = session.scalars(select(ModelRow).where(ModelRow.name == model)).one()
        row.active_version_id = session.scalars(select(VersionRow.id).where(
            VersionRow.model_id == row.id, VersionRow.number == number)).one()
        session.commit()


def stored_spec(app: Flask, model: str) -> dict[str, Any]:
    with get_database(app).read() as session:
        spec: dict[str, Any] = session.scalars(
            select(ModelRow.spec).where(ModelRow.name == model)).one()
        return spec
