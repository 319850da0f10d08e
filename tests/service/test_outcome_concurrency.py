"""docs/architecture.md, invariant 1, with outcomes: outcome batches and record
batches of one model stored at once commit in sequence order, and every key
(a record's, or a case's that got its outcome) is stored exactly once, checked
as key sets. Outcomes for the same cases sent concurrently are accepted once."""

from __future__ import annotations

import threading
from typing import Any

from flask import Flask
from sqlalchemy import select

from service.store.tables import ScoredCaseRow
from service.usecases.outcomes import CheckedOutcomes, OutcomeResult, ingest_outcomes
from service.web.extensions import get_database
from service.web.schemas.rules import rules_for
from tests.service.helpers import ApiClient, ingest_raw, model_row, record
from tests.service.outcome_helpers import scored_pumps
from tests.service.test_ingest_concurrency import assert_stored_once, committed_seqs

CASES = 240
BATCH = 20
RECORD_WRITERS = 2
RECORD_BATCHES = 6


def label_of(i: int) -> str:
    return "failed" if i % 5 == 0 else "ok"


def send_outcomes(app: Flask, keys: list[int]) -> OutcomeResult:
    """Check outcomes for cases ``st-<i>`` as the API does, and store them."""
    model = model_row(app, "pump-risk")
    outcomes = rules_for(model.spec).load_outcomes(
        {"outcomes": [{"key": f"st-{i}", "label": label_of(i)} for i in keys]},
        max_outcomes=10_000)
    return ingest_outcomes(get_database(app).write, "pump-risk",
                           CheckedOutcomes(model.id, model.spec, outcomes))


def test_outcomes_and_records_at_once_store_every_key_once(
        any_api: ApiClient, any_app: Flask) -> None:
    scored_pumps(any_api, CASES)
    model_id = model_row(any_app, "pump-risk").id
    database = get_database(any_app)
    errors: list[BaseException] = []
    results: list[OutcomeResult] = []
    violations: list[tuple[int, int]] = []
    done = threading.Event()
    lock = threading.Lock()

    def outcomes(writer: int) -> None:
        # Two writers over the same cases, in opposite orders: each case's
        # outcome is accepted by one of them, a duplicate for the other.
        order = list(range(CASES)) if writer == 0 else list(reversed(range(CASES)))
        try:
            for start in range(0, CASES, BATCH):
                result = send_outcomes(any_app, order[start:start + BATCH])
                with lock:
                    results.append(result)
        except BaseException as exc:  # surfaced below
            errors.append(exc)

    def records(writer: int) -> None:
        try:
            for b in range(RECORD_BATCHES):
                ingest_raw(database.write, "pump-risk",
                           [record(i, key=f"r{writer}-{b}-{i}") for i in range(BATCH)])
        except BaseException as exc:
            errors.append(exc)

    def watch() -> None:
        seen: set[int] = set()
        while True:
            finished = done.is_set()
            now = committed_seqs(any_app, model_id)
            top = max(seen, default=0)
            violations.extend((s, top) for s in now if s not in seen and s < top)
            seen.update(now)
            if finished:
                return

    threads: list[Any] = [threading.Thread(target=outcomes, args=(w,)) for w in range(2)]
    threads += [threading.Thread(target=records, args=(w,)) for w in range(RECORD_WRITERS)]
    watcher = threading.Thread(target=watch)
    watcher.start()
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    done.set()
    watcher.join()
    assert errors == [] and violations == []
    assert sum(r.accepted for r in results) == CASES
    assert sum(r.duplicates for r in results) == CASES
    sent = {f"st-{i}" for i in range(CASES)} | {
        f"r{w}-{b}-{i}" for w in range(RECORD_WRITERS) for b in range(RECORD_BATCHES)
        for i in range(BATCH)}
    assert_stored_once(any_app, "pump-risk", sent)
    with database.read() as session:
        stored = dict(session.execute(select(ScoredCaseRow.key, ScoredCaseRow.outcome)).all())
    assert stored == {f"st-{i}": label_of(i) for i in range(CASES)}
