"""Use case: a model's track record over a window of days (live metrics, alarm).

Reads only the day rows in the window (one per version and UTC day of the
outcome) and the alarm rows of those versions: its cost grows with the window
and the versions in it, never with the cases or outcomes behind them.
"""

from __future__ import annotations

import datetime as dt
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from engine.track_record import Tally
from service.store.database import Database
from service.store.tables import ModelRow, TrackRecordAlarmRow, TrackRecordDayRow, VersionRow
from service.usecases.common import as_utc, find_model
from service.usecases.track_record import full_spec, tally_of_row

DEFAULT_WINDOW_DAYS = 30
MAX_WINDOW_DAYS = 366
# The alarm's per-case loss, by task (engine.track_record.case_losses).
ALARM_LOSS = {"binary": "brier", "multiclass": "brier", "regression": "relative_absolute_error"}


def resolve_window(since: dt.date | None, until: dt.date | None, today: dt.date
                   ) -> tuple[dt.date, dt.date]:
    """The window read: ``until`` defaults to today (or ``since``, if that is
    later), ``since`` to DEFAULT_WINDOW_DAYS - 1 days before ``until``. A window
    over MAX_WINDOW_DAYS is cut to the MAX_WINDOW_DAYS days ending at
    ``until``; a reversed one (``since`` after ``until``) reads no day. Never a
    refusal: every pair of dates the document allows is answered."""
    if until is None:
        until = today if since is None else max(today, since)
    earliest = _days_before(until, MAX_WINDOW_DAYS - 1)
    if since is None:
        since = _days_before(until, DEFAULT_WINDOW_DAYS - 1)
    return max(since, earliest), until


def _days_before(day: dt.date, days: int) -> dt.date:
    return day - dt.timedelta(days=days) if day.toordinal() > days else dt.date.min


def main_metric_name(task: str) -> str:
    """The daily series' metric: log loss (a proper score, defined on any day
    with an outcome) for classification, RMSE for regression."""
    return "rmse" if task == "regression" else "log_loss"


def track_record(db: Database, name: str, since: dt.date, until: dt.date) -> dict[str, Any]:
    """GET /v1/models/{name}/track-record: per version, the metrics, calibration
    and daily series of the outcomes received from ``since`` to ``until``
    (UTC days, both included), and the alarms."""
    with db.read() as session:
        model = find_model(session, name)
        spec = full_spec(model)
        task = spec["task"]
        rows = session.execute(
            select(TrackRecordDayRow, VersionRow.number)
            .join(VersionRow, VersionRow.id == TrackRecordDayRow.version_id)
            .where(TrackRecordDayRow.model_id == model.id,
                   TrackRecordDayRow.day >= since, TrackRecordDayRow.day <= until)
            .order_by(VersionRow.number, TrackRecordDayRow.day)).all()
        active_id = model.active_version_id
        version_ids = {row.version_id for row, _ in rows}
        if active_id is not None:
            version_ids.add(active_id)
        alarms = _alarms(session, model.id, version_ids)
        active_number = None
        if active_id is not None:
            active_number = session.scalar(select(VersionRow.number).where(
                VersionRow.id == active_id))
    parameters = {"delta": spec["alarm"]["delta"], "threshold": spec["alarm"]["threshold"],
                  "loss": ALARM_LOSS[task]}
    versions: dict[int, dict[str, Any]] = {}
    totals: dict[int, Tally] = {}
    for row, number in rows:
        tally = tally_of_row(task, row)
        totals[number] = totals.get(number, Tally(task)).merged(tally)
        entry = versions.setdefault(number, {
            "version": number, "active": row.version_id == active_id,
            "alarm": _alarm_view(alarms.get(row.version_id), parameters), "daily": []})
        entry["daily"].append({"day": row.day.isoformat(), "n": tally.n,
                               "value": tally.main_metric()})
    for number, entry in versions.items():
        entry["metrics"] = totals[number].metrics()
        entry["calibration"] = totals[number].calibration_table()
    return {
        "model": name, "task": task, "since": since.isoformat(), "until": until.isoformat(),
        "main_metric": main_metric_name(task),
        "versions": list(versions.values()),
        "active_version": active_number,
        "alarm": (None if active_id is None
                  else _alarm_view(alarms.get(active_id), parameters)),
    }


def _alarms(session: Session, model_id: int, version_ids: set[int]
            ) -> dict[int, TrackRecordAlarmRow]:
    if not version_ids:
        return {}
    return {row.version_id: row for row in session.scalars(select(TrackRecordAlarmRow).where(
        TrackRecordAlarmRow.model_id == model_id,
        TrackRecordAlarmRow.version_id.in_(version_ids)))}


def _alarm_view(row: TrackRecordAlarmRow | None, parameters: dict[str, Any]) -> dict[str, Any]:
    """The alarm of one version over every outcome it has had (not just the window)."""
    if row is None:
        return {"state": "calm", "since": None, "cases": 0, "statistic": 0.0, **parameters}
    return {"state": "calm" if row.raised_at is None else "raised",
            "since": as_utc(row.raised_at), "cases": row.n,
            "statistic": row.cumulative - row.minimum, **parameters}


def live_gauges(db: Database, today: dt.date) -> list[dict[str, Any]]:
    """Per model with an active version: its main metric over the default
    window and its alarm, for /metrics. Two queries whatever the history: the
    active versions' day rows in the window, and their alarm rows."""
    since, until = resolve_window(None, None, today)
    with db.read() as session:
        actives = session.execute(
            select(ModelRow.id, ModelRow.name, ModelRow.spec, VersionRow.number)
            .join(VersionRow, VersionRow.id == ModelRow.active_version_id)).all()
        days = session.execute(
            select(TrackRecordDayRow).join(ModelRow, (
                ModelRow.id == TrackRecordDayRow.model_id)
                & (ModelRow.active_version_id == TrackRecordDayRow.version_id))
            .where(TrackRecordDayRow.day >= since, TrackRecordDayRow.day <= until)).scalars()
        by_model: dict[int, list[TrackRecordDayRow]] = {}
        for row in days:
            by_model.setdefault(row.model_id, []).append(row)
        raised = {model_id: raised_at is not None for model_id, raised_at in session.execute(
            select(TrackRecordAlarmRow.model_id, TrackRecordAlarmRow.raised_at).join(
                ModelRow, (ModelRow.id == TrackRecordAlarmRow.model_id)
                & (ModelRow.active_version_id == TrackRecordAlarmRow.version_id)))}
    gauges = []
    for model_id, name, spec, number in actives:
        task = spec.get("task")
        if task not in ALARM_LOSS:
            continue  # a damaged spec: the model's own routes say so
        tally = Tally(task)
        for row in by_model.get(model_id, ()):
            tally = tally.merged(tally_of_row(task, row))
        gauges.append({"model": name, "version": number, "metric": main_metric_name(task),
                       "value": tally.main_metric(), "n": tally.n,
                       "raised": raised.get(model_id, False)})
    return gauges
