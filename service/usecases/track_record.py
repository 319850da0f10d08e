"""Use case: keep the live track record of served scores as outcomes arrive.

Placeholder of the interface the outcomes use case calls (the live-metrics lane
fills it): ``record_outcomes`` runs in the transaction that accepts outcomes,
with each outcome joined to the score that was served for its case.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy.orm import Session

from service.store.tables import ModelRow


@dataclass(frozen=True)
class JoinedOutcome:
    """An accepted outcome beside the score served for its case."""

    version_id: int
    output: Any  # the stored served output: probabilities by class, or the value
    label: Any  # the outcome's label as the API takes it
    scored_at: dt.datetime
    outcome_at: dt.datetime


def record_outcomes(session: Session, model: ModelRow, joined: Sequence[JoinedOutcome]) -> None:
    """Filled by the live-metrics lane."""
