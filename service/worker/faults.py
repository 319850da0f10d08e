"""A model the worker cannot load or train is backed off alone.

One model's damaged data (a stored spec or record that does not decode or
validate, a head snapshot that does not load) or an unexpected failure in its
step must not stop the others: the worker records the fault on that model's
trainer row (shown as ``trainer.error`` on ``GET /v1/models/{name}``, with
``trainer.retry_at``), gives up its lease, and no worker takes the model again
before ``retry_at``. The wait doubles with each try that fails in a row, from
``retry_seconds`` up to ``retry_max_seconds``, so a fault that lasts costs one
try and one log line per step of the back-off, not a traceback per poll.

The next try that stores progress (a version, or the cursor moved past
holdout records) or finds nothing left to do clears the fault; promoting a
version of another lineage clears it too. ``trainers.error`` keeps its own
meaning: the lineage diverged, and waits for a promotion (invariant 6).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from engine import EngineError, apply_defaults
from service.store.database import transaction
from service.store.record_log import UnreadableRecord
from service.store.tables import ModelRow, utcnow
from service.versions.writes import lock_trainer

# The longest fault text stored: enough for any message we write, bounded
# whatever an exception carries.
MAX_FAULT_TEXT = 1000


# What an answer shows of a failure we did not foresee: the exception's own
# text may name internals (a class, a query, a file path); the log has it all.
UNEXPECTED = "an unexpected error; the worker's log has the details"


class ModelFault(Exception):
    """This model cannot be loaded or trained for now; the message says why,
    in words an operator can act on. ``head_id``: the head version the try
    started from, when the fault is the head's. ``detail``: what a library
    said of it, for the log only."""

    def __init__(self, message: str, head_id: int | None = None,
                 detail: str | None = None) -> None:
        super().__init__(message)
        self.head_id = head_id
        self.detail = detail


ANY_HEAD: Any = object()  # record_fault: whatever the trainer's head is now


@dataclass(frozen=True)
class Fault:
    """A try that failed, as recorded: the how-many-th in a row, and the wait."""

    text: str
    count: int
    delay: float


def is_expected(exc: BaseException) -> bool:
    """Whether ``exc`` is a fault whose message says it all (no traceback needed)."""
    return isinstance(exc, ModelFault | EngineError | UnreadableRecord)


def describe(exc: BaseException) -> str:
    """The fault text for ``exc`` that is stored and shown (``trainer.error``,
    a job's ``error``): its own message when we wrote it, a plain sentence of
    ours otherwise (never an exception's type, text or traceback)."""
    return (str(exc) if is_expected(exc) else UNEXPECTED)[:MAX_FAULT_TEXT]


def log_text(exc: BaseException) -> str:
    """What the log says of ``exc``: everything ``describe`` leaves out."""
    detail = getattr(exc, "detail", None) if is_expected(exc) else None
    if detail:
        return f"{exc} ({detail})"
    return str(exc) if is_expected(exc) else f"{type(exc).__name__}: {exc}"


def back_off_seconds(count: int, first: float, largest: float) -> float:
    """The wait after the ``count``-th failed try in a row: ``first``, doubling,
    at most ``largest``."""
    return float(min(largest, first * 2.0 ** min(max(count - 1, 0), 64)))


def record_fault(writes: sessionmaker[Session], model_id: int, worker_id: str, text: str,
                 first: float, largest: float, head_id: Any = ANY_HEAD) -> Fault | None:
    """Store the fault on the model's trainer row and give up the lease, in
    one transaction; None when this worker no longer holds the model (another
    worker's tries count there) or when the try started from ``head_id`` and
    the head has moved since (a promotion: the next try starts from the new
    head, and a stale fault must not stand against it)."""
    with transaction(writes) as session:
        trainer = lock_trainer(session, model_id)
        if trainer.leased_by != worker_id:
            return None
        if head_id is not ANY_HEAD and trainer.head_version_id != head_id:
            return None
        count = (trainer.faults or 0) + 1
        delay = back_off_seconds(count, first, largest)
        now = utcnow()
        trainer.fault, trainer.faults = text, count
        trainer.retry_at = now + dt.timedelta(seconds=delay)
        trainer.leased_by = trainer.lease_expires_at = None
        trainer.updated_at = now
    return Fault(text, count, delay)


def clear_fault(writes: sessionmaker[Session], model_id: int, worker_id: str) -> None:
    """The model trains again (nothing was left to fail): forget the fault."""
    with transaction(writes) as session:
        trainer = lock_trainer(session, model_id)
        if trainer.leased_by == worker_id:
            trainer.clear_fault()


def load_spec(session: Session, model_id: int) -> dict[str, Any]:
    """The model's stored spec, checked as the engine checks a new one;
    ModelFault naming what is wrong when it cannot be read or is invalid."""
    try:
        row = session.get(ModelRow, model_id)
    except ValueError as exc:  # the JSON does not decode (orjson's error is one)
        raise ModelFault("the model's stored spec cannot be read: it is not valid JSON text",
                         detail=str(exc)) from None
    if row is None:
        raise ModelFault("the model no longer exists")
    spec = row.spec
    if not isinstance(spec, dict):
        raise ModelFault("the model's stored spec is not a JSON object")
    try:
        apply_defaults(spec)
    except EngineError as exc:
        raise ModelFault(f"the model's stored spec is invalid: {exc}") from None
    return dict(spec)
