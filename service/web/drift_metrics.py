"""/metrics series for drift, read at scrape time.

Worked out from the stored tallies of every API process (the same figures
GET /v1/models/{name}/drift answers with its default window), so a scrape
answered by any worker reports the whole server, up to the one flush
interval each process has not written yet.

- ``keelson_drift_psi{model, field}``: each field's PSI;
- ``keelson_drift_status{model, status}``: 1 for the model's worst field
  status (``steady``, ``shifting``, ``shifted``), 0 for the others (no sample
  while nothing has been compared).
"""

from __future__ import annotations

import logging
from collections.abc import Iterator
from typing import Any

from flask import Flask
from prometheus_client.core import GaugeMetricFamily
from sqlalchemy import select

from engine.drift import STATUSES
from service.store.tables import ModelRow
from service.usecases.drift import drift_report
from service.versions.cache import ModelNotFound
from service.web.extensions import get_database, get_drift_references, get_version_cache

log = logging.getLogger(__name__)


class DriftCollector:
    """A prometheus_client collector over one app's models."""

    def __init__(self, app: Flask) -> None:
        self.app = app

    def collect(self) -> Iterator[Any]:
        psi = GaugeMetricFamily("keelson_drift_psi",
                                "Population stability index of each field's predictions of "
                                "the last 7 days against the active version's reference.",
                                labels=["model", "field"])
        status = GaugeMetricFamily("keelson_drift_status",
                                   "1 for the model's worst field drift status, 0 for the "
                                   "others.", labels=["model", "status"])
        database = get_database(self.app)
        cache = get_version_cache(self.app)
        references = get_drift_references(self.app)
        with database.read() as session:
            names = list(session.scalars(select(ModelRow.name).where(
                ModelRow.active_version_id.is_not(None)).order_by(ModelRow.name)))
        for name in names:
            try:
                report = drift_report(database, references, cache.model(name))
            except ModelNotFound:
                continue
            except Exception:  # one model's failure must not blank the scrape
                log.exception("drift metrics of model %r could not be read", name)
                continue
            for field in report["fields"]:
                if field["psi"] is not None:
                    psi.add_metric([name, field["name"]], field["psi"])
            if report["status"] is not None:
                for state in STATUSES:
                    status.add_metric([name, state], 1.0 if state == report["status"] else 0.0)
        yield psi
        yield status
