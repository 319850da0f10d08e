"""What the overview and the model page show, read through the same use cases
the API answers with (no second copy of a rule), plus the few columns only a
page needs (who made each version active, and why; a model's recent jobs).

Each page costs a fixed number of queries whatever the model's history: the
versions come in one query without their snapshots, the promotions in one, the
track record reads its day rows in the window and the drift its hourly tallies.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Collection
from typing import Any

from markupsafe import Markup
from sqlalchemy import select

from engine.drift import STATUSES
from service.errors import KeelsonError
from service.store.database import Database
from service.store.model_events import PROMOTED
from service.store.tables import DriftTallyRow, JobRow, ModelEventRow, VersionRow
from service.usecases import models, track_record_summary, versions
from service.usecases.common import as_utc, find_model
from service.usecases.drift import drift_report, version_drift, window_start
from service.usecases.drift_reference import ReferenceCache
from service.usecases.predictions import find_model as cached_model
from service.versions.cache import VersionCache

MAX_MODELS = 1000
# Rows of the versions table unless all are asked for (the curve has every one).
VERSIONS_SHOWN = 30
RECENT_JOBS = 10
# Every version a model has, for the curve and the table: bounded by what a
# model keeps; past it the oldest are left out of the page (the API pages them).
MAX_VERSIONS = 5000


def main_metric(task: str) -> str:
    return track_record_summary.main_metric_name(task)


def overview(db: Database, cache: VersionCache, references: ReferenceCache,
             only: Collection[str] | None) -> list[dict[str, Any]]:
    """Every model the session may see, those needing attention first: a raised
    alarm, then the worst drift, then a trainer that cannot train, then lag."""
    listed, _ = models.list_models(db, limit=MAX_MODELS, only=only)
    gauges = {gauge["model"]: gauge for gauge in
              track_record_summary.live_gauges(db, dt.datetime.now(dt.UTC).date())}
    rows = []
    for model in listed:
        gauge = gauges.get(model["name"])
        report = drift(db, cache, references, model["name"])
        trainer = model["trainer"]
        rows.append({
            "name": model["name"], "task": model["task"],
            "active_version": model["active_version"],
            "records": model["records"]["total"], "lag": trainer["lag"],
            "trainer_error": trainer.get("error"), "paused": trainer["paused"],
            "metric": main_metric(model["task"]),
            "live": _overview_live(db, model, gauge),
            "alarm": None if gauge is None else ("raised" if gauge["raised"] else "calm"),
            "drift": None if report is None else report["status"],
            "drift_report": report,
        })
    rows.sort(key=_attention, reverse=True)
    return rows


def _attention(row: dict[str, Any]) -> tuple[int, int, int, int]:
    drift = -1 if row["drift"] is None else STATUSES.index(row["drift"])
    return (row["alarm"] == "raised", drift, row["trainer_error"] is not None, row["lag"])


def _overview_live(db: Database, model: dict[str, Any], gauge: dict[str, Any] | None
                   ) -> dict[str, Any] | None:
    """The serving version's live metric; when it has no outcomes in the window
    (a version made serving since), the latest version's that has some, marked
    as not serving. One more read only for models in that case."""
    if gauge is not None and gauge["n"]:
        return {"version": gauge["version"], "value": gauge["value"], "n": gauge["n"],
                "serving": True}
    if model["active_version"] is None:
        return None
    since, until = track_record_summary.resolve_window(
        None, None, dt.datetime.now(dt.UTC).date())
    record = track_record_summary.track_record(db, model["name"], since, until)
    return latest_live(record, main_metric(model["task"]))


def latest_live(record: dict[str, Any], metric: str) -> dict[str, Any] | None:
    """From a track record, the live figure of the serving version when it has
    outcomes in the window, else of the highest-numbered version that has some
    (None when no version has any)."""
    scored = [v for v in record["versions"] if v["metrics"].get("n")]
    if not scored:
        return None
    latest = max(scored, key=lambda v: (v["active"], v["version"]))
    return {"version": latest["version"], "value": latest["metrics"].get(metric),
            "n": int(latest["metrics"]["n"]), "serving": bool(latest["active"]),
            "calibration": latest["calibration"]}


def drift(db: Database, cache: VersionCache, references: ReferenceCache, name: str
          ) -> dict[str, Any] | None:
    """The API's drift answer, or None when there is nothing to compare yet.
    When the serving version has served no prediction in the window (made
    serving since), ``earlier`` is the same answer for the latest version that
    has, so the page can show it, marked as not the serving version's."""
    try:
        entry = cached_model(cache, name)
        report = drift_report(db, references, entry)
        if not report["recent_predictions"]:
            report["earlier"] = _earlier_drift(db, references, entry, report)
        return report
    except KeelsonError as exc:
        if exc.status == 404:
            raise
        return None  # no active version yet, or it changed meanwhile


def _earlier_drift(db: Database, references: ReferenceCache, entry: Any,
                   report: dict[str, Any]) -> dict[str, Any] | None:
    since = window_start(report["window"]["days"])
    with db.read() as session:
        found = session.execute(
            select(DriftTallyRow.version_id, VersionRow.number)
            .join(VersionRow, VersionRow.id == DriftTallyRow.version_id)
            .where(DriftTallyRow.model_id == entry.id, DriftTallyRow.bucket_start >= since,
                   DriftTallyRow.version_id != entry.active_version_id,
                   DriftTallyRow.predictions > 0)
            .order_by(VersionRow.number.desc()).limit(1)).first()
    if found is None:
        return None
    earlier = version_drift(db, references, entry, found.version_id, found.number,
                            report["window"]["days"])
    return earlier if earlier["recent_predictions"] else None


def model_page(db: Database, cache: VersionCache, references: ReferenceCache,
               name: str, *, all_versions: bool = False) -> dict[str, Any]:
    """The model page's data. The curve has every version; the table the
    latest VERSIONS_SHOWN unless ``all_versions``."""
    model = models.get_model(db, name)
    with db.read() as session:
        model_id = find_model(session, name).id
        made_active = _promotions(session, model_id)
        jobs = _jobs(session, model_id)
        every = session.execute(
            select(VersionRow.number, VersionRow.records_seen, VersionRow.metrics)
            .where(VersionRow.model_id == model_id)
            .order_by(VersionRow.number.desc()).limit(MAX_VERSIONS)).all()
    shown = max(1, len(every) if all_versions else VERSIONS_SHOWN)
    first = every[shown - 1].number if every and shown <= len(every) else None
    listed, _ = versions.list_versions(db, name, limit=shown,
                                       after=None if first is None else first - 1)
    today = dt.datetime.now(dt.UTC).date()
    since, until = track_record_summary.resolve_window(None, None, today)
    record = track_record_summary.track_record(db, name, since, until)
    live = {entry["version"]: entry for entry in record["versions"]}
    metric = main_metric(model["task"])
    for version in listed:
        version["made_active"] = made_active.get(version["number"])
        entry = live.get(version["number"])
        version["live"] = None if entry is None else entry["metrics"].get(metric)
    shown_live = latest_live(record, metric)
    return {
        "model": model, "versions": listed, "metric": metric, "jobs": jobs,
        "version_count": len(every),
        "curve": learning_curve(every, live, metric, model["active_version"]),
        "live": shown_live,
        "alarm": record["alarm"], "window": {"since": since, "until": until},
        "drift": drift(db, cache, references, name),
        "serving_since": made_active.get(model["active_version"], {}).get("at"),
    }


def learning_curve(every: Any, live: dict[int, dict[str, Any]], metric: str,
                   active: int | None) -> dict[str, Any]:
    """One point per version with a figure: x records seen, the holdout,
    prequential and live figures (None where there is none)."""
    points = []
    for number, seen, figures in sorted(every, key=lambda v: (v.records_seen, v.number)):
        figures = figures or {}
        holdout = (figures.get("holdout") or {}).get(metric)
        prequential = (figures.get("prequential") or {}).get(metric)
        entry = live.get(number)
        on_live = None if entry is None else entry["metrics"].get(metric)
        if holdout is None and prequential is None and on_live is None:
            continue
        points.append({"version": number, "x": seen, "holdout": holdout,
                       "prequential": prequential, "live": on_live,
                       "active": number == active})
    series: dict[str, Any] = {key: [p[key] for p in points]
                              for key in ("version", "x", "holdout", "prequential", "live")}
    series["active"] = next((i for i, p in enumerate(points) if p["active"]), None)
    return {"metric": metric, "points": points, "series": series,
            "rows": _curve_rows(points)}


def _curve_rows(points: list[dict[str, Any]]) -> Markup:
    """The curve's table body, made here: hundreds of rows of numbers only,
    where the template's filters cost more than the page's queries."""
    def cell(value: float | None) -> str:
        return "–" if value is None else f"{value:.4f}"
    return Markup("".join(
        f'<tr data-curve-version="{p["version"]}"><th scope="row">{p["version"]}'
        f'{" (serving)" if p["active"] else ""}</th><td class="num">{p["x"]:,}</td>'
        f'<td class="num">{cell(p["holdout"])}</td><td class="num">'
        f'{cell(p["prequential"])}</td><td class="num">{cell(p["live"])}</td></tr>'
        for p in points))


def _promotions(session: Any, model_id: int) -> dict[int, dict[str, Any]]:
    """Per version number, the latest act that made it active: when, by which
    token, why, and whether the automatic rule did it."""
    found: dict[int, dict[str, Any]] = {}
    for row in session.scalars(select(ModelEventRow).where(
            ModelEventRow.model_id == model_id, ModelEventRow.kind == PROMOTED)
            .order_by(ModelEventRow.id)):
        number = (row.details or {}).get("version")
        if isinstance(number, int):
            found[number] = {"at": as_utc(row.created_at), "token": row.token,
                             "reason": row.reason,
                             "automatic": bool((row.details or {}).get("automatic"))}
    return found


def recent_jobs(db: Database, name: str) -> list[dict[str, Any]]:
    """The model's latest retrains, newest first (the page's refresh reads these)."""
    with db.read() as session:
        return _jobs(session, find_model(session, name).id)


def _jobs(session: Any, model_id: int) -> list[dict[str, Any]]:
    rows = session.execute(
        select(JobRow, VersionRow.number).outerjoin(VersionRow, VersionRow.id == JobRow.version_id)
        .where(JobRow.model_id == model_id, JobRow.kind == "retrain")
        .order_by(JobRow.id.desc()).limit(RECENT_JOBS)).all()
    return [{"id": job.id, "status": job.status, "progress": job.progress,
             "version": number, "error": job.error, "created_at": as_utc(job.created_at),
             "finished_at": as_utc(job.finished_at)} for job, number in rows]
