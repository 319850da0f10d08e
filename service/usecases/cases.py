"""Use case: keep the scored cases of keyed predictions, durably, before answering.

A keyed prediction stores what was scored (the validated features), by which
version, what it answered and when, so an outcome sent weeks later becomes a
labelled record without the client keeping the features (usecases/outcomes.py).
The same key with the same features again is a re-score: counted, the first
score kept (it is the one that was acted on). The same key with other features
is a 409 that changes nothing. Unkeyed predictions never come here.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import insert, select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session, sessionmaker

from service.errors import ConflictError
from service.store.tables import ScoredCaseRow, VersionRow, utcnow
from service.store.value_lists import rows_matching
from service.usecases.case_writer import case_writer


@dataclass(frozen=True, slots=True)
class ScoredCase:
    """One keyed row as scored: ``output`` is the probabilities or the value."""

    key: str
    features: Mapping[str, Any]
    output: Any


class CaseConflictError(ConflictError):
    """A key already names a case scored with other features: nothing stored."""

    problem_type = "urn:keelson:problem:case-conflict"


def keep_cases(sessions: sessionmaker[Session], model_id: int, version_number: int,
               cases: Sequence[ScoredCase], paths: Sequence[str]) -> list[bool]:
    """Store ``cases`` scored by version ``version_number`` of the model, in one
    write transaction; per case whether it was a re-score.

    One case with a new key (a keyed GET, the common request) goes to the
    process's group commit (usecases/case_writer.py): one INSERT and one
    commit for all keyed requests waiting at that moment, no ORM session (its
    cost per request was three times the explained prediction itself).
    Anything else (a batch, a key seen before) takes the session path below.

    ``paths`` name each case's key in an error (``key``, ``records.3.key``).
    Raises CaseConflictError, naming every key sent before with other features
    (or twice in the batch with different ones). A concurrent first score of
    the same key (PostgreSQL: the unique constraint) is retried once, and is
    then a re-score or a conflict like any other.
    """
    if len(cases) == 1 and case_writer(sessions).insert_new(model_id, version_number,
                                                            cases[0]):
        return [False]
    for attempt in (1, 2):
        try:
            with sessions() as session, session.begin():
                return _keep(session, model_id, version_number, cases, paths)
        except IntegrityError:
            if attempt == 2:
                raise
    raise AssertionError("unreachable")


def _keep(session: Session, model_id: int, version_number: int,
          cases: Sequence[ScoredCase], paths: Sequence[str]) -> list[bool]:
    stored = _stored_features(session, model_id, [case.key for case in cases])
    conflicts: dict[str, list[str]] = {}
    rescored: list[bool] = []
    fresh: dict[str, ScoredCase] = {}
    counts: dict[str, int] = {}
    for case, path in zip(cases, paths, strict=True):
        # Compared as stored: JSON text back to values (floats round-trip exactly).
        features = json.loads(json.dumps(case.features))
        earlier = stored.get(case.key)
        if earlier is None:
            stored[case.key] = features
            fresh[case.key] = case
            rescored.append(False)
        elif earlier != features:
            conflicts[path] = [f"Case {case.key!r} was scored before with other features."]
        else:
            rescored.append(True)
            if case.key not in fresh:
                counts[case.key] = counts.get(case.key, 0) + 1
    if conflicts:
        keys = ", ".join(repr(cases[paths.index(path)].key) for path in conflicts)
        raise CaseConflictError(
            f"A case key names one case: {keys} was scored before with other features. "
            "Nothing was stored; send a new key for a new case.", errors=conflicts)
    if fresh:
        version_id = session.scalar(select(VersionRow.id).where(
            VersionRow.model_id == model_id, VersionRow.number == version_number))
        now = utcnow()
        session.execute(insert(ScoredCaseRow), [
            {"model_id": model_id, "key": case.key, "features": dict(case.features),
             "version_id": version_id, "output": case.output, "scored_at": now,
             "rescored": 0}
            for case in fresh.values()])
    # Rows locked in key order, as an outcome batch locks them (find_cases):
    # two such transactions never wait for each other in a cycle.
    for key, count in sorted(counts.items()):
        session.execute(update(ScoredCaseRow).where(
            ScoredCaseRow.model_id == model_id, ScoredCaseRow.key == key).values(
            rescored=ScoredCaseRow.rescored + count))
    return rescored


def _stored_features(session: Session, model_id: int, keys: list[str]
                     ) -> dict[str, dict[str, Any]]:
    """The stored features of those of ``keys`` that name a case of the model."""
    return dict(find_cases(session, model_id, keys, ScoredCaseRow.features))


def find_cases(session: Session, model_id: int, keys: Sequence[str], *columns: Any,
               lock: bool = False) -> list[Any]:
    """``(key, *columns)`` of the model's cases named by ``keys``, in one
    query on PostgreSQL, in chunks on SQLite (service/store/value_lists.py). ``lock``:
    lock those rows until the transaction ends (PostgreSQL; a SQLite write
    transaction holds the database lock already), so retention cannot delete
    a case an outcome is being joined with (service/worker/retention.py)."""
    unique = list(dict.fromkeys(keys))
    query = select(ScoredCaseRow.key, *columns).where(ScoredCaseRow.model_id == model_id)
    if lock and session.get_bind().dialect.name == "postgresql":
        # In key order, as re-scores update them (no deadlock between the two).
        query = query.with_for_update().order_by(ScoredCaseRow.key)
    return rows_matching(session, query, ScoredCaseRow.key, unique)
