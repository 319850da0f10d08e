"""Scored cases kept by the group commit (service/usecases/case_writer.py):
keyed requests of one process arriving together are committed together, and
each still gets its own outcome (docs/http-api.md, "Scored cases": a new key
is stored, the same key and features again is a re-score, other features a
409 that stores nothing)."""

from __future__ import annotations

import threading
from typing import Any

from flask import Flask
from sqlalchemy import select

from service.store.tables import ScoredCaseRow
from service.usecases.cases import CaseConflictError, ScoredCase, keep_cases
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, create_model, model_row
from tests.service.test_predictions_api import PUMP, pump_version

THREADS = 12


def keep_at_once(app: Flask, cases: list[ScoredCase]) -> list[Any]:
    """Keep each case from a thread of its own, all released together; per
    case its re-score flag or the error it raised."""
    model_id = model_row(app, "pump-risk").id
    sessions = get_database(app).write
    start = threading.Barrier(len(cases))
    outcomes: list[Any] = [None] * len(cases)

    def keep(index: int) -> None:
        start.wait()
        try:
            (outcomes[index],) = keep_cases(sessions, model_id, 1, [cases[index]], ["key"])
        except Exception as error:  # the outcome under test
            outcomes[index] = error

    threads = [threading.Thread(target=keep, args=(i,)) for i in range(len(cases))]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    return outcomes


def stored(app: Flask) -> dict[str, tuple[dict[str, Any], int]]:
    with get_database(app).read() as session:
        return {row.key: (row.features, row.rescored)
                for row in session.scalars(select(ScoredCaseRow))}


def test_keyed_requests_at_once_are_each_stored_once(any_api: ApiClient) -> None:
    create_model(any_api)
    pump_version(any_api)
    keys = [f"station-{i}/2026-11" for i in range(THREADS)]
    outcomes = keep_at_once(any_api.app, [ScoredCase(key, PUMP, [0.25, 0.75])
                                          for key in keys])
    assert outcomes == [False] * THREADS
    assert stored(any_api.app) == {key: (PUMP, 0) for key in keys}


def test_one_key_sent_at_once_is_one_case_and_the_rest_rescores(
        any_api: ApiClient) -> None:
    create_model(any_api)
    pump_version(any_api)
    outcomes = keep_at_once(any_api.app, [ScoredCase("station-3/2026-11", PUMP, [0.25, 0.75])
                                          for _ in range(THREADS)])
    assert sorted(outcomes) == [False] + [True] * (THREADS - 1)
    assert stored(any_api.app) == {"station-3/2026-11": (PUMP, THREADS - 1)}


def test_one_key_with_other_features_at_once_stores_one_and_refuses_the_other(
        any_api: ApiClient) -> None:
    create_model(any_api)
    pump_version(any_api)
    other = {**PUMP, "vibration_rms": 80.0}
    outcomes = keep_at_once(any_api.app, [ScoredCase("station-5/2026-11", PUMP, [0.5, 0.5]),
                                          ScoredCase("station-5/2026-11", other, [0.5, 0.5])])
    assert sorted(map(type, outcomes), key=str) == sorted([bool, CaseConflictError], key=str)
    winner = PUMP if outcomes[0] is False else other
    assert stored(any_api.app) == {"station-5/2026-11": (winner, 0)}
