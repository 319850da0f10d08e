"""/metrics series of the track record, read from the database at scrape time.

Read at scrape time rather than counted per process, they are the same
whichever gunicorn worker answers the scrape. Labelled by model and its active
version; one child per model, so their number follows the models, not clients.
"""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Iterator

from prometheus_client.core import GaugeMetricFamily
from prometheus_client.registry import Collector
from sqlalchemy.exc import SQLAlchemyError

from service.store.database import Database
from service.usecases.track_record_summary import DEFAULT_WINDOW_DAYS, live_gauges

_log = logging.getLogger("keelson.observability")


class TrackRecordCollector(Collector):
    def __init__(self, db: Database) -> None:
        self.db = db

    def collect(self) -> Iterator[GaugeMetricFamily]:
        try:
            gauges = live_gauges(self.db, dt.datetime.now(dt.UTC).date())
        except SQLAlchemyError:  # the scrape still answers the request series
            _log.exception("could not read the track record for /metrics")
            return
        metric = GaugeMetricFamily(
            "keelson_live_metric",
            f"The active version's main live metric over the last {DEFAULT_WINDOW_DAYS} days "
            "of outcomes (log_loss or rmse); absent without outcomes.",
            labels=["model", "version", "metric"])
        outcomes = GaugeMetricFamily(
            "keelson_live_outcomes",
            f"Outcomes of the active version's scores in the last {DEFAULT_WINDOW_DAYS} days.",
            labels=["model", "version"])
        alarm = GaugeMetricFamily(
            "keelson_alarm_raised",
            "1 when the active version's change alarm is raised, 0 when calm.",
            labels=["model", "version"])
        for gauge in gauges:
            version = str(gauge["version"])
            if gauge["value"] is not None:
                metric.add_metric([gauge["model"], version, gauge["metric"]], gauge["value"])
            outcomes.add_metric([gauge["model"], version], gauge["n"])
            alarm.add_metric([gauge["model"], version], 1.0 if gauge["raised"] else 0.0)
        yield from (metric, outcomes, alarm)
