"""The what-if page: a form generated from the model's spec, prefilled with
the serving version's baseline; sent (a GET, so a result can be linked and
reloaded), it shows the scores, the attribution per field and a sweep per
numeric field, through the same use cases as POST predictions and POST sweeps.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from flask import render_template, request
from werkzeug.datastructures import MultiDict

from engine.drift_bins import GRID_QUANTILES
from service.errors import InvalidInputError
from service.usecases.predictions import (
    PredictionOptions,
    class_key,
    find_model,
    load_version,
    predict,
)
from service.usecases.sweeps import sweep_record
from service.web.extensions import get_drift_references, get_version_cache
from service.web.pages.guard import blueprint, looks
from service.web.pages.numbers import rounded
from service.web.schemas.predictions import prediction_readers

SWEEP_POINTS = 25
# Sent by the form's button, so an empty checkbox reads as false only then.
SENT = "show"


@blueprint.route("/models/<model:name>/what-if", methods=["GET"])
@looks
def what_if(name: str) -> str:
    cache = get_version_cache()
    entry = find_model(cache, name)
    spec = entry.spec
    learner = load_version(cache, entry, None).learner
    baseline = learner.encoder.raw_baseline(learner.input_mean)
    features = spec["features"]
    sent = SENT in request.args
    values = _given(features) if sent else _prefill(features, baseline)
    result = problem = None
    if sent:
        try:
            result = _score(cache, entry, features)
        except InvalidInputError as exc:
            problem = {"detail": exc.detail, "errors": exc.errors or {}}
    return render_template("what_if.html", name=name, spec=spec, features=features,
                           values=values, baseline=baseline, result=result, problem=problem,
                           percentiles=(LOW_PERCENTILE, HIGH_PERCENTILE))


def _prefill(features: list[dict[str, Any]], baseline: Mapping[str, Any]) -> dict[str, Any]:
    """The baseline as form values: a number, the most common level, and true
    when most of what the model learned from was true."""
    values: dict[str, Any] = {}
    for feature in features:
        value = baseline[feature["name"]]
        if feature["type"] == "categorical":
            values[feature["name"]] = max(value, key=value.get)
        elif feature["type"] == "boolean":
            values[feature["name"]] = value >= 0.5
        else:
            values[feature["name"]] = _round(value)
    return values


def _round(value: float) -> float:
    return float(f"{value:.6g}")


def _given(features: list[dict[str, Any]]) -> dict[str, Any]:
    """What the form sent, as typed (a boolean absent from it is false)."""
    values: dict[str, Any] = {}
    for feature in features:
        name = feature["name"]
        if feature["type"] == "boolean":
            values[name] = request.args.get(name) == "true"
        else:
            values[name] = request.args.get(name, "")
    return values


def _query(features: list[dict[str, Any]]) -> MultiDict[str, str]:
    query: MultiDict[str, str] = MultiDict()
    for feature in features:
        name = feature["name"]
        if feature["type"] == "boolean":
            query[name] = "true" if request.args.get(name) == "true" else "false"
        else:
            query[name] = request.args.get(name, "")
    return query


def _score(cache: Any, entry: Any, features: list[dict[str, Any]]) -> dict[str, Any]:
    """The prediction with its explanation, and the sweeps of the same record."""
    row, _, _ = prediction_readers(entry).read_query(_query(features))
    number, baseline, (answer,) = predict(cache, entry, [row], PredictionOptions())
    swept = sweep_record(cache, entry, row, fields=None, points=SWEEP_POINTS,
                         output=None, version=number)
    covered = training_ranges(get_drift_references(),
                              load_version(cache, entry, swept["version"]).id)
    for one in swept["sweeps"]:
        one["trained"] = covered.get(one["field"])
    explanation = answer["explanation"]
    attributions = explanation["attributions"]
    scale = max((abs(v) for v in attributions.values()), default=0.0) or 1.0
    return {
        "version": number, "result": answer["result"], "explanation": explanation,
        "reference_records": covered.get(RECORDS_KEY, 0),
        "bars": [{"field": field, "value": value, "width": round(100 * abs(value) / scale, 1)}
                 for field, value in attributions.items()],
        "sweeps": swept["sweeps"], "sweep_class": swept["output"],
        "baseline": baseline,
        "predicted": class_key(answer["result"]["label"]) if "label" in answer["result"]
        else None,
    }


# Where training_ranges puts the number of records the ranges come from.
RECORDS_KEY = "_records"
# The percentiles marked as the training data's range: the drift reference's
# grid runs from its 1st to its 99th percentile (engine/drift_bins.py), so
# the odd extreme record does not stretch it.
LOW_PERCENTILE = round(100 * float(GRID_QUANTILES[0]))
HIGH_PERCENTILE = round(100 * float(GRID_QUANTILES[-1]))


def training_ranges(references: Any, version_id: int) -> dict[str, Any]:
    """Per numeric field, the 1st and 99th percentiles of the training records
    the version learned from (its drift reference: the last 10,000 at most),
    as exact values and as read; a field with no records is left out."""
    bins = references.load(version_id) or ()
    out: dict[str, Any] = {RECORDS_KEY: int(bins[0].reference.sum()) if bins else 0}
    for field in bins:
        if field.kind == "numeric" and field.edges:
            low, high = field.edges[0], field.edges[-1]
            out[field.name] = {"low": low, "high": high, "low_text": rounded(low),
                               "high_text": rounded(high)}
    return out
