"""What one prediction request may cost, how long it may run, and when to stop.

An explanation's work grows with the records, the rows the engine evaluates
per record and the network's size. Per explained record the engine runs a
forward and a backward pass over ``steps + 1`` points of the path plus the
input and the baseline (integrated gradients), ``samples`` noisy points plus
the same two (SmoothGrad), or the input and the baseline (a gradient). Shapley
values run forward passes only: every one of the 2^d coalitions of its d
fields (exact, d up to KEELSON_SHAPLEY_EXACT_FIELDS), or ``samples`` orders of
d + 1 points each (sampled). Without an explanation every record is one row of
a single batched forward pass.

The cost of a request, in budget units:

    records x (rows per record + PASS_ROWS) x (parameters + UNIT_COST x units)

``units`` are the network's hidden and output units (each runs an activation,
which costs about as much as UNIT_COST multiply-adds), and each explained
record's passes over the weights cost about PASS_ROWS rows beyond its own
(matrix-vector products run at memory speed, not at matrix speed); a request
without explanations pays neither. Both constants were measured (README,
"Request budget"): with them, a budget unit cost 0.05 to 0.23 ns of one core
of the development machine in every request of 1,000 records that took 0.3 s
or more, for networks from 20-16-1 to 20-1024-1024-1024-1 and every method,
where a plain records x rows x parameters count varied from 0.09 to 26 ns.
(Smaller requests pay a fixed 10 to 25 us per record that the batch limit
bounds to a few tens of milliseconds.)

The answer counts too: ANSWER_BYTE_COST units per byte it may take (an
estimate from above, made before any work by ``usecases.predictions``). A
model's answer to a small record can be large (1,000 classes named with 200
characters: 220 KB of probabilities per record of 33 bytes, so a 33 KB
request once drew a 224 MB answer). Building and sending an answer took 3.7
to 15 ns a byte (16 to 300 units); a byte is charged more, 500, on purpose:
at the default budget no answer exceeds 16 MB, the largest request body,
while an ordinary answer of 1,000 records (some 600 bytes each) costs 3e8,
under 4 % of the budget.

A request over ``KEELSON_PREDICTION_BUDGET`` is refused before any work (422,
the figures in the answer); the default, 8e9, keeps a request under about
2 s of one core.

A request within budget can still be slow on a busy host: its deadline
(``KEELSON_PREDICTION_DEADLINE_SECONDS``, from the moment the view started) is
checked between records and ends it with 503 and ``Retry-After`` (the server's
load, not the request, is at fault). Where the server can tell the client has
gone (see service/web/disconnect.py), the work stops between records too.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable
from dataclasses import dataclass, field

import engine
from service.errors import KeelsonError

log = logging.getLogger(__name__)

OVER_BUDGET = "urn:keelson:problem:over-budget"
DEADLINE = "urn:keelson:problem:deadline-exceeded"
# How often, at most, the client's connection is looked at (a system call).
PEEK_SECONDS = 0.05


class OverBudgetError(KeelsonError):
    status = 422
    problem_type = OVER_BUDGET


class DeadlineExceededError(KeelsonError):
    status = 503
    problem_type = DEADLINE


class ClientGoneError(KeelsonError):
    """The client closed its connection: nobody reads the answer. Answered
    with nginx's 499 (Client Closed Request) for the access log and metrics."""

    status = 499
    title = "Client Closed Request"


PASS_ROWS = 8
UNIT_COST = 100
ANSWER_BYTE_COST = 500




def rows_per_record(explain: str, steps: int, samples: int | None, fields: int = 0,
                    exact_fields: int = engine.SHAPLEY_EXACT_FIELDS) -> int:
    """Rows the engine evaluates per record, the passes' own cost included;
    ``fields``: the model's (Shapley values' players)."""
    if explain == "none":
        return 1  # one row of the batched forward pass
    if explain == "integrated_gradients":
        return steps + 3 + PASS_ROWS
    if explain == "smoothgrad":
        return (engine.DEFAULT_SAMPLES if samples is None else samples) + 2 + PASS_ROWS
    if explain == "shapley":
        if fields <= exact_fields or samples is None:
            return (1 << min(fields, exact_fields)) + PASS_ROWS
        return samples * (fields + 1) + PASS_ROWS
    return 2 + PASS_ROWS  # gradient, gradient_times_input: the input and the baseline


def request_cost(records: int, explain: str, steps: int, samples: int | None,
                 parameters: int, units: int, fields: int = 0,
                 exact_fields: int = engine.SHAPLEY_EXACT_FIELDS) -> int:
    """The budget units a prediction request costs (see the module's docstring)."""
    rows = rows_per_record(explain, steps, samples, fields, exact_fields)
    return records * rows * (parameters + UNIT_COST * units)


@dataclass(slots=True)
class PredictionLimits:
    """One request's budget, deadline and client probe (mutable: it remembers
    when it last looked at the connection)."""

    budget: int
    deadline_seconds: float
    exact_fields: int = engine.SHAPLEY_EXACT_FIELDS
    started: float = field(default_factory=time.monotonic)
    client_gone: Callable[[], bool] | None = None
    _next_peek: float = 0.0

    def check_cost(self, records: int, explain: str, steps: int, samples: int | None,
                   parameters: int, units: int, answer_bytes: int = 0,
                   fields: int = 0) -> None:
        """OverBudgetError, before any work, when the request costs too much:
        its computation, and ``answer_bytes``, at most what its answer takes."""
        compute = request_cost(records, explain, steps, samples, parameters, units, fields,
                               self.exact_fields)
        cost = compute + ANSWER_BYTE_COST * answer_bytes
        if cost <= self.budget:
            return
        rows = rows_per_record(explain, steps, samples, fields, self.exact_fields)
        raise OverBudgetError(
            f"This request would cost {cost:,} budget units, over the budget of "
            f"{self.budget:,} per request: {compute:,} to compute ({records:,} records x "
            f"{rows:,} row{'s' if rows != 1 else ''} evaluated per record "
            f"(explain={explain}) x {parameters + UNIT_COST * units:,} for a network of "
            f"{parameters:,} parameters and {units:,} units) and "
            f"{ANSWER_BYTE_COST * answer_bytes:,} for an answer of up to {answer_bytes:,} "
            f"bytes ({ANSWER_BYTE_COST} a byte). Send fewer records per request, lower steps "
            "or samples, or explain with gradient or none.",
            members={"budget": self.budget, "cost": cost},
        )

    def between_records(self, done: int, total: int) -> None:
        """Called before each record after the first: the deadline, and whether
        the client is still there (looked at most every PEEK_SECONDS)."""
        now = time.monotonic()
        if now - self.started > self.deadline_seconds:
            raise DeadlineExceededError(
                f"The prediction ran past its deadline of {self.deadline_seconds:g} s "
                f"({done:,} of {total:,} records done): the server is busy. Retry later, "
                "or send fewer records per request.",
                headers={"Retry-After": "1"},
                members={"deadline_seconds": self.deadline_seconds},
            )
        if self.client_gone is not None and now >= self._next_peek:
            self._next_peek = now + PEEK_SECONDS
            if self.client_gone():
                log.info("prediction stopped: the client closed the connection after %s of "
                         "%s records", done, total)
                raise ClientGoneError(
                    f"The client closed the connection; stopped after {done:,} of "
                    f"{total:,} records.")
