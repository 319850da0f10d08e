"""Taking forgotten outcomes out of the track record's day sums.

An outcome's case row keeps what its contribution was computed from: the
version that served it, the served output, the outcome and the time it was
accepted (its UTC day). So the forget recomputes each forgotten outcome's
sums exactly as ``record_outcomes`` added them and subtracts them from the
same (version, day) rows (``engine.Tally.without``): the counts come out
exact, the sums to floating-point rounding; a day left with no outcome loses
its row.

The change alarm is not undone: Page-Hinkley is a sequential test whose
state cannot be rewound without every outcome in order, which the track
record does not keep. An alarm state keeps the forgotten outcomes (and a
raised alarm stays raised); docs/http-api.md says so.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from engine.track_record import Tally
from service.store.tables import ModelRow, TrackRecordDayRow
from service.usecases.common import as_utc
from service.usecases.track_record import (
    JoinedOutcome,
    full_spec,
    outcome_day,
    served_arrays,
    tally_of_row,
    write_tally,
)


def take_out_outcomes(session: Session, model: ModelRow, cases: Sequence[Any]) -> int:
    """Subtract the outcomes of ``cases`` (rows with ``version_id``,
    ``output``, ``outcome``, ``outcome_at``) from the model's day sums, in
    the caller's transaction (which holds the model row lock, as an outcome
    batch does). Returns how many outcomes were taken out."""
    if not cases:
        return 0
    spec = full_spec(model)
    joined = [JoinedOutcome(version_id=row.version_id, output=row.output, label=row.outcome,
                            scored_at=as_utc(row.scored_at) or dt.datetime.now(dt.UTC),
                            outcome_at=as_utc(row.outcome_at) or dt.datetime.now(dt.UTC))
              for row in cases]
    y, scores = served_arrays(spec["task"], spec["classes"], joined)
    by_day: dict[tuple[int, dt.date], list[int]] = {}
    for index, outcome in enumerate(joined):
        by_day.setdefault((outcome.version_id, outcome_day(outcome.outcome_at)), []
                          ).append(index)
    stored = {
        (row.version_id, row.day): row
        for row in session.scalars(select(TrackRecordDayRow).where(
            TrackRecordDayRow.model_id == model.id,
            TrackRecordDayRow.version_id.in_({version for version, _ in by_day}),
            TrackRecordDayRow.day.in_({day for _, day in by_day})))
    }
    taken = 0
    for key, indices in by_day.items():
        row = stored.get(key)
        if row is None or row.n < len(indices):  # not as added: nothing safe to undo
            continue
        rest = tally_of_row(spec["task"], row).without(
            Tally.of(spec["task"], y[indices], scores[indices]))
        taken += len(indices)
        if rest.n == 0:
            session.delete(row)
        else:
            write_tally(row, rest)
    return taken
