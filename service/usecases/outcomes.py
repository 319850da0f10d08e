"""Use case: accept outcomes of scored cases, all or nothing.

An outcome names a scored case by its key and says what happened (its label).
Accepting one does two things in one transaction under the model lock:

- the case becomes a labelled record (its stored features, the outcome's label,
  its key) through ``store_records``, the same code every record goes through,
  so the holdout split, the sequence order and exactly-once learning hold for
  it as for any record (docs/architecture.md, invariant 1);
- it is joined with the score served for the case and handed to the track
  record (``service.usecases.track_record.record_outcomes``).

A batch with an unknown key (422, every one named) or a label that contradicts
an outcome already stored (409) changes nothing. The same outcome again is a
duplicate.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Text, cast
from sqlalchemy.orm import Session, sessionmaker

from service.errors import ConflictError, InvalidInputError
from service.store.tables import ModelRow, ScoredCaseRow, utcnow
from service.usecases.cases import find_cases
from service.usecases.common import as_utc, find_model
from service.usecases.records import (
    JSONText,
    ModelChangedError,
    same_record_shape,
    store_records,
)
from service.usecases.track_record import JoinedOutcome, record_outcomes

NAMED_IN_DETAIL = 10  # keys named in a problem's detail (its errors name all)


@dataclass(frozen=True, slots=True)
class CheckedOutcomes:
    """Outcomes (``{"key", "label"}``, labels loaded) checked against one model's spec."""

    model_id: int
    spec: Mapping[str, Any]
    outcomes: Sequence[Mapping[str, Any]]


@dataclass(frozen=True)
class OutcomeResult:
    accepted: int
    duplicates: int


class OutcomeConflictError(ConflictError):
    """An outcome contradicts one already stored for its case: nothing stored."""

    problem_type = "urn:keelson:problem:outcome-conflict"


class UnknownCaseError(InvalidInputError):
    """An outcome names no scored case (never scored with a key, or expired)."""

    problem_type = "urn:keelson:problem:unknown-case"


def ingest_outcomes(sessions: sessionmaker[Session] | Session, model_name: str,
                    checked: CheckedOutcomes) -> OutcomeResult:
    """Accept ``checked`` outcomes for ``model_name`` in one write transaction
    (committed here, or rolled back and re-raised). Raises NotFoundError,
    UnknownCaseError, OutcomeConflictError or ModelChangedError."""
    session = sessions() if isinstance(sessions, sessionmaker) else sessions
    try:
        locked = find_model(session, model_name, lock=True)
        if locked.id != checked.model_id or not same_record_shape(locked.spec, checked.spec):
            raise ModelChangedError(
                f"Model {model_name!r} changed while its outcomes were checked; nothing "
                "was stored. Send them again.", headers={"Retry-After": "0"})
        result = _accept(session, locked, checked.outcomes)
        session.commit()
        return result
    except Exception:
        session.rollback()
        raise
    finally:
        if isinstance(sessions, sessionmaker):
            session.close()


def _accept(session: Session, model: ModelRow, outcomes: Sequence[Mapping[str, Any]]
            ) -> OutcomeResult:
    found = {row.key: row for row in find_cases(
        session, model.id, [o["key"] for o in outcomes], ScoredCaseRow.id,
        cast(ScoredCaseRow.features, Text).label("features"), ScoredCaseRow.version_id,
        ScoredCaseRow.output, ScoredCaseRow.scored_at, ScoredCaseRow.outcome, lock=True)}
    _refuse_unknown(outcomes, found)
    known: dict[str, Any] = {key: row.outcome for key, row in found.items()
                             if row.outcome is not None}
    fresh: list[tuple[Any, Any]] = []  # (case row, label)
    conflicts: dict[str, list[str]] = {}
    for index, outcome in enumerate(outcomes):
        key, label = outcome["key"], outcome["label"]
        if key in known:
            if not _same(known[key], label):
                conflicts[f"outcomes.{index}.label"] = [
                    f"Case {key!r} already has the outcome {known[key]!r}."]
            continue
        known[key] = label
        fresh.append((found[key], label))
    if conflicts:
        raise OutcomeConflictError(
            f"{_count(len(conflicts), 'outcome')} contradict what is already known of "
            "their cases; nothing was stored.", errors=conflicts)
    if not fresh:
        return OutcomeResult(accepted=0, duplicates=len(outcomes))
    now = utcnow()
    _mark_cases(session, [(case.id, label) for case, label in fresh], now)
    store_records(session, model, [  # the features as the case stored them
        {"key": case.key, "features": JSONText(case.features), "label": label}
        for case, label in fresh])
    record_outcomes(session, model, [
        JoinedOutcome(version_id=case.version_id, output=case.output, label=label,
                      scored_at=as_utc(case.scored_at) or now, outcome_at=now)
        for case, label in fresh if case.version_id is not None])
    return OutcomeResult(accepted=len(fresh), duplicates=len(outcomes) - len(fresh))


def _mark_cases(session: Session, outcomes: list[tuple[int, Any]], now: dt.datetime) -> None:
    """Set each case's outcome and its time, the values serialized once here:
    on PostgreSQL one UPDATE joined with the batch sent as one JSON text (one
    round trip; an UPDATE per case cost about a third of a 1,000-outcome
    batch), on SQLite (in process) one statement run for each case by the
    driver."""
    connection = session.connection()
    dialect = connection.dialect
    stamp_of = ScoredCaseRow.__table__.c.outcome_at.type.dialect_impl(
        dialect).bind_processor(dialect)
    stamp = stamp_of(now) if stamp_of is not None else now
    if dialect.name == "postgresql":  # the batch as one JSON parameter (value_lists.py)
        connection.exec_driver_sql(
            "UPDATE scored_cases SET outcome = batch.outcome, outcome_at = %s "
            "FROM json_to_recordset(%s::json) AS batch(id BIGINT, outcome JSON) "
            "WHERE scored_cases.id = batch.id",
            (stamp, json.dumps([{"id": case_id, "outcome": label}
                                for case_id, label in outcomes])))
        return
    connection.exec_driver_sql(
        "UPDATE scored_cases SET outcome = ?, outcome_at = ? WHERE id = ?",
        [(json.dumps(label), stamp, case_id) for case_id, label in outcomes])


def _refuse_unknown(outcomes: Sequence[Mapping[str, Any]], found: Mapping[str, Any]) -> None:
    unknown = {f"outcomes.{i}.key": o["key"] for i, o in enumerate(outcomes)
               if o["key"] not in found}
    if not unknown:
        return
    names = list(dict.fromkeys(unknown.values()))
    named = ", ".join(repr(key) for key in names[:NAMED_IN_DETAIL])
    more = f" and {len(names) - NAMED_IN_DETAIL} more" if len(names) > NAMED_IN_DETAIL else ""
    raise UnknownCaseError(
        f"No case was scored with {_count(len(names), 'key')}: {named}{more}. Nothing was "
        "stored. Send a prediction with the key first (or the case expired).",
        errors={path: ["No case was scored with this key."] for path in unknown})


def _same(stored: Any, label: Any) -> bool:
    # A class is compared with its type: the class 1 is not the class true.
    return type(stored) is type(label) and stored == label if not isinstance(
        label, float) else float(stored) == label


def _count(n: int, what: str) -> str:
    return f"{n} {what}" if n == 1 else f"{n} {what}s"
