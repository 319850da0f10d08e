"""Domain series on ``/metrics``, labelled by model.

Two kinds, each correct whichever gunicorn worker answers the scrape:

- counted as they happen, in prometheus_client's multiprocess mode like the
  request counters (service/web/observability.py), summed over the workers at
  scrape time: predictions served (records scored, by version and explanation
  method) and outcomes received;
- read from the database at scrape time, the same from every worker: records
  stored, trainer lag and the active version, per model (three queries
  however many models there are: service/usecases/models.py, ``model_states``).

Label values come from closed sets: a model name is counted only after the
model was found, a version is a stored version's number, a method one of the
explanation methods.
"""

from __future__ import annotations

import functools
import logging
from collections.abc import Iterator
from typing import Any

from prometheus_client import Counter
from prometheus_client.core import GaugeMetricFamily
from prometheus_client.registry import Collector

from service.store.database import Database
from service.usecases.models import model_states

_log = logging.getLogger("keelson.observability")


@functools.cache
def domain_counters() -> tuple[Counter, Counter]:
    """Made on first use, per process (as the request metrics are)."""
    predictions = Counter(
        "keelson_predictions_served_total",
        "Records scored, by model, serving version and explanation method (`explain`).",
        ["model", "version", "explain"])
    outcomes = Counter(
        "keelson_outcomes_received_total",
        "Outcomes of scored cases accepted (duplicates not counted), by model.", ["model"])
    return predictions, outcomes


# Counter children by label values: labels() builds and locks on every call.
_served: dict[tuple[str, int, str], Any] = {}
_received: dict[str, Any] = {}


def count_served(model: str, version: int, method: str, records: int) -> None:
    """``records`` scored by ``version`` of ``model`` with ``method``."""
    key = (model, version, method)
    child = _served.get(key)
    try:
        if child is None:
            child = _served[key] = domain_counters()[0].labels(model, str(version), method)
        child.inc(records)
    except OSError:  # a lost metrics folder must not fail the answer itself
        _log.exception("could not record prediction metrics")


def count_received(model: str, outcomes: int) -> None:
    if not outcomes:
        return
    child = _received.get(model)
    try:
        if child is None:
            child = _received[model] = domain_counters()[1].labels(model)
        child.inc(outcomes)
    except OSError:
        _log.exception("could not record outcome metrics")


class ModelStateCollector(Collector):
    """Records stored, trainer lag and active version per model, read from the
    database at scrape time. A database that does not answer leaves these
    series out (and says so in ``keelson_model_state_up``), never the scrape."""

    def __init__(self, database: Database) -> None:
        self.database = database

    def collect(self) -> Iterator[GaugeMetricFamily]:
        up = GaugeMetricFamily("keelson_model_state_up",
                               "1 when the per-model series below were read from the "
                               "database at this scrape, 0 when it did not answer.")
        try:
            states = model_states(self.database)
        except Exception as exc:  # the scrape goes on without them
            _log.warning("metrics: model state unreadable: %s", type(exc).__name__)
            up.add_metric([], 0)
            yield up
            return
        up.add_metric([], 1)
        yield up
        stored = GaugeMetricFamily("keelson_records_stored",
                                   "Labelled records stored, by model.", labels=["model"])
        lag = GaugeMetricFamily("keelson_trainer_lag_records",
                                "Records stored after the online trainer's saved position.",
                                labels=["model"])
        active = GaugeMetricFamily("keelson_active_version",
                                   "Number of the version that serves (0: none yet).",
                                   labels=["model"])
        for state in states:
            stored.add_metric([state["name"]], state["records"]["total"])
            lag.add_metric([state["name"]], state["trainer"]["lag"])
            active.add_metric([state["name"]], state["active_version"] or 0)
        yield from (stored, lag, active)
