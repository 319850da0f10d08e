"""docs/architecture.md, invariant 1, for records made from outcomes: outcome
batches and record batches sent at once while a worker trains end with every
train record learned exactly once, in sequence order (the head's weights equal
one pass of the engine alone over the train records, bit for bit), and each
case's outcome is one record keyed by the case."""

from __future__ import annotations

import datetime as dt
import threading
from typing import Any

from sqlalchemy import select

from service.store.database import Database
from service.store.tables import ModelRow, RecordRow, ScoredCaseRow
from service.usecases.outcomes import CheckedOutcomes, ingest_outcomes
from service.web.schemas.rules import rules_for
from tests.worker.helpers import (
    assert_trained_exactly_once,
    caught_up,
    database,
    new_model,
    numeric_spec,
    send,
    wait_until,
    worker_thread,
)

CASES = 240
BATCH = 40
RECORDS = 240


def features(i: int) -> dict[str, float]:
    return {"x0": float(i % 17) / 4.0, "x1": float((i * 7) % 11) - 5.0}


def add_cases(db: Database, model_id: int) -> None:
    scored = dt.datetime(2026, 11, 1, tzinfo=dt.UTC)
    with db.write() as session:
        session.add_all(ScoredCaseRow(model_id=model_id, key=f"case-{i}", features=features(i),
                                      version_id=None, output={"false": 0.5, "true": 0.5},
                                      scored_at=scored, rescored=0) for i in range(CASES))
        session.commit()


def send_outcomes(db: Database, name: str, start: int) -> None:
    with db.read() as session:
        model = session.scalars(select(ModelRow).where(ModelRow.name == name)).one()
    outcomes = rules_for(model.spec).load_outcomes({"outcomes": [
        {"key": f"case-{i}", "label": i % 3 == 0} for i in range(start, start + BATCH)]},
        max_outcomes=BATCH)
    ingest_outcomes(db.write, name, CheckedOutcomes(model.id, model.spec, outcomes))


def test_outcomes_become_records_the_worker_learns_exactly_once(database_url: str) -> None:
    db = database(database_url)
    try:
        model_id = new_model(db, numeric_spec("cases", ["x0", "x1"], training={
            "warmup_records": 32, "checkpoint_every": 100}))
        add_cases(db, model_id)
        errors: list[BaseException] = []

        def outcomes() -> None:
            try:
                for start in range(0, CASES, BATCH):
                    send_outcomes(db, "cases", start)
            except BaseException as exc:  # surfaced below
                errors.append(exc)

        def records() -> None:
            try:
                rows: list[dict[str, Any]] = [
                    {"key": f"rec-{i}", "features": features(i + 5), "label": i % 4 == 0}
                    for i in range(RECORDS)]
                send(db, "cases", rows, batch=BATCH)
            except BaseException as exc:
                errors.append(exc)

        with worker_thread(database_url):
            threads = [threading.Thread(target=outcomes), threading.Thread(target=records)]
            for thread in threads:
                thread.start()
            for thread in threads:
                thread.join()
            assert errors == []
            wait_until(lambda: caught_up(db, model_id))
        assert_trained_exactly_once(db, model_id)
        with db.read() as session:
            keys = list(session.scalars(select(RecordRow.key).where(
                RecordRow.model_id == model_id)))
            labels = dict(session.execute(select(RecordRow.key, RecordRow.label).where(
                RecordRow.key.like("case-%"))).all())
        assert len(keys) == len(set(keys)) == CASES + RECORDS
        assert labels == {f"case-{i}": i % 3 == 0 for i in range(CASES)}
    finally:
        db.engine.dispose()
