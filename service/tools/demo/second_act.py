"""The demo's second act: weeks later, the outcomes of the cases it scored.

After training, the utility scores the next weeks of its pumps with case keys
(each score is kept as a scored case). A heat wave then runs the bearings of
half the stations hotter, through the weather alone (invented, like all the
demo's data). Weeks later the maintenance system sends what happened, as a
CSV of outcomes. The act shows what an operator then reads: how the served
scores fared (the track record and its calibration), whether the change alarm
rose, and which fields drifted from what the model learned from.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Callable, Mapping
from typing import Any

from service.tools.demo import data as demo_data

# Weeks after the last training week at which the scored weeks begin.
WEEKS_LATER = 4
HEAT_WAVE_STATIONS = frozenset(range(1, demo_data.STATIONS // 2 + 1))
HEAT_WAVE_C = 12.0
# Cases scored per request (within KEELSON_MAX_PREDICTION_BATCH's default).
SCORE_BATCH = 500

Echo = Callable[[str], None]


def scored_weeks(training_records: int, cases: int, seed: int) -> list[dict[str, Any]]:
    """The pump-weeks scored in the second act, heat wave included."""
    pumps = demo_data.STATIONS * demo_data.PUMPS_PER_STATION
    first_week = -(-training_records // pumps) + WEEKS_LATER
    return list(demo_data.generate_records(
        cases, seed, first_week=first_week, heat_wave_stations=HEAT_WAVE_STATIONS,
        heat_wave_c=HEAT_WAVE_C))


def outcomes_csv(cases: list[dict[str, Any]]) -> str:
    """What the maintenance system sends weeks later: key and label per case."""
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(["key", "label"])
    writer.writerows((case["key"], case["label"]) for case in cases)
    return out.getvalue()


def play(api: Any, flush_drift: Callable[[], None], echo: Echo, *, training_records: int,
         cases: int, seed: int) -> dict[str, Any]:
    """Score ``cases`` keyed pump-weeks, send their outcomes, show the results;
    answers the track record and drift the act read."""
    name = demo_data.MODEL_NAME
    weeks = scored_weeks(training_records, cases, seed)
    stations = ", ".join(str(s) for s in sorted(HEAT_WAVE_STATIONS))
    echo("Second act, weeks later (INVENTED, like the rest). The utility scored the next "
         f"{len(weeks)} pump-weeks with case keys; a heat wave ran the bearings of stations "
         f"{stations} about {HEAT_WAVE_C:g} °C hotter meanwhile.")
    for start in range(0, len(weeks), SCORE_BATCH):
        batch = weeks[start:start + SCORE_BATCH]
        api.call("POST", f"/v1/models/{name}/predictions", json={
            "records": [{"key": case["key"], "features": case["features"]} for case in batch],
            "explain": "none"})
    flush_drift()
    body, _ = api.call("POST", f"/v1/models/{name}/outcomes", expect=(201,),
                       data=outcomes_csv(weeks), content_type="text/csv")
    echo(f"The maintenance system then sent what happened, as CSV: {body['accepted']} "
         f"outcomes accepted, {body['duplicates']} already known (each new one also becomes "
         "a labelled record to learn from).\n")
    record, _ = api.call("GET", f"/v1/models/{name}/track-record")
    drift, _ = api.call("GET", f"/v1/models/{name}/drift")
    echo(render_track_record(record))
    echo("")
    echo(render_drift(drift))
    return {"track_record": record, "drift": drift}


def _figure(value: Any, digits: int = 3) -> str:
    return "-" if value is None else f"{value:.{digits}f}"


def render_track_record(record: Mapping[str, Any]) -> str:
    lines = [f"How the served scores fared (track record, {record['since']} to "
             f"{record['until']}):"]
    for version in record["versions"]:
        metrics = version["metrics"]
        shown = ", ".join(f"{key} {_figure(metrics.get(key))}"
                          for key in ("accuracy", "roc_auc", "log_loss", "brier")
                          if key in metrics)
        active = " (active)" if version["active"] else ""
        lines.append(f"  version {version['version']}{active}: {int(metrics['n'])} outcomes; "
                     f"{shown}")
        lines.append("    calibration: predicted P(failed) against how often it happened")
        for row in version["calibration"]:
            if row["count"]:
                lines.append(f"      {row['lower']:.1f}-{row['upper']:.1f}: {row['count']:>5} "
                             f"cases, predicted {_figure(row['mean_predicted'], 2)}, "
                             f"happened {_figure(row['observed_rate'], 2)}")
    alarm = record.get("alarm")
    if alarm:
        state = (f"raised since {alarm['since']}" if alarm["state"] == "raised"
                 else alarm["state"])
        lines.append(f"  change alarm of the active version: {state} (after {alarm['cases']} "
                     "outcomes)")
    return "\n".join(lines)


def render_drift(drift: Mapping[str, Any]) -> str:
    lines = [f"Drift of the inputs: the last {drift['window']['days']} days of predictions "
             f"({drift['recent_predictions']}) against the active version's training "
             f"records ({drift['reference_records']}); PSI 0.1 and 0.25 are the usual lines:"]
    for field in drift["fields"]:
        test = field.get("ks") or field.get("chi_square") or {}
        p_value = test.get("p_value")
        lines.append(f"  {field['name']:<24} PSI {_figure(field['psi'])}  {field['status']:<9}"
                     f" p {'-' if p_value is None else f'{p_value:.2g}'}")
    moved = [f"{field['name']} ({field['status']})" for field in drift["fields"]
             if field["status"] in ("shifting", "shifted")]
    if moved:
        lines.append(f"Moved since training: {', '.join(moved)}. The model learned from other "
                     "conditions; check the sensors, and let it learn from the new weeks' "
                     "outcomes (or retrain) before leaning on its scores there.")
    else:
        lines.append("No field has moved past PSI 0.1.")
    return "\n".join(lines)
