"""Retention of scored cases: those still without an outcome are deleted
``KEELSON_CASE_RETENTION_DAYS`` after they were scored.

In batches of ``BATCH`` rows, one short write transaction each, model by
model through the (model_id, outcome_at, scored_at) index: a batch holds the
row locks of the cases it deletes for milliseconds (PostgreSQL) or the
database write lock as briefly (SQLite), so predictions and outcomes never
wait on it for long. An outcome and the deletion of its case cannot both
happen: the outcome locks the case rows it reads (service/usecases/outcomes.py)
and the deletion re-checks ``outcome_at IS NULL`` on rows it waited for.
"""

from __future__ import annotations

import datetime as dt

from sqlalchemy import delete, select
from sqlalchemy.orm import Session, sessionmaker

from service.store.database import transaction
from service.store.tables import ModelRow, ScoredCaseRow, utcnow

BATCH = 1_000  # cases deleted per transaction
MAX_BATCHES = 10  # per call: the worker's loop goes on between calls
INTERVAL_SECONDS = 60.0  # between calls once nothing more has expired


def purge_expired_cases(writes: sessionmaker[Session], reads: sessionmaker[Session],
                        retention_days: float, *, now: dt.datetime | None = None,
                        max_batches: int = MAX_BATCHES) -> tuple[int, bool]:
    """Delete up to ``max_batches`` batches of expired unresolved cases; how
    many were deleted, and whether some may remain (call again soon)."""
    cutoff = (now or utcnow()) - dt.timedelta(days=retention_days)
    with reads() as session:
        models = list(session.scalars(select(ModelRow.id).order_by(ModelRow.id)))
    deleted, batches = 0, 0
    for model_id in models:
        expired = (ScoredCaseRow.model_id == model_id, ScoredCaseRow.outcome_at.is_(None),
                   ScoredCaseRow.scored_at < cutoff)
        # A model with nothing expired costs one index probe, no write
        # transaction, and no batch of the call's few: otherwise a fleet of
        # more than ``max_batches`` models was never looked at past its first
        # few, and every call said more may remain (a pass every poll).
        with reads() as session:
            if session.scalar(select(ScoredCaseRow.id).where(*expired).limit(1)) is None:
                continue
        while True:
            if batches == max_batches:
                return deleted, True
            batches += 1
            with transaction(writes) as session:
                ids = select(ScoredCaseRow.id).where(*expired).limit(BATCH)
                if session.get_bind().dialect.name == "postgresql":
                    # A case an outcome is being joined with is skipped, not waited for.
                    ids = ids.with_for_update(skip_locked=True)
                # Two statements: PostgreSQL may run a LIMIT subquery inside a
                # DELETE more than once, deleting more than a batch.
                found = list(session.scalars(ids))
                removed = 0
                if found:
                    result = session.execute(delete(ScoredCaseRow).where(
                        ScoredCaseRow.id.in_(found), ScoredCaseRow.outcome_at.is_(None)
                    ).execution_options(synchronize_session=False))
                    removed = int(result.rowcount)  # type: ignore[attr-defined]
            deleted += removed
            if removed < BATCH:
                break
    return deleted, False
