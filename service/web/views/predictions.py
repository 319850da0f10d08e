"""GET and POST /v1/models/{name}/predictions (predict): scored and explained.

The hot path of the service: a warm GET reads no database (the version cache
holds the model and its network), builds no schema (each model's readers are
built once) and dumps its answer straight to JSON.
"""

from __future__ import annotations

import time
from typing import Any

import orjson
from flask import Flask, Response, current_app, request

from service.usecases.cases import ScoredCase, keep_cases
from service.usecases.prediction_limits import PredictionLimits
from service.usecases.predictions import find_model, predict
from service.web.auth import requires
from service.web.disconnect import client_gone_probe
from service.web.domain_metrics import count_served
from service.web.extensions import get_database, get_drift_tally, get_version_cache
from service.web.schemas.predictions import (
    PredictionBatchSchema,
    PredictionQuerySchema,
    PredictionRequestSchema,
    PredictionSchema,
    prediction_readers,
)
from service.web.views.base import Blueprint, read_json_body

blueprint = Blueprint(
    "predictions", __name__, url_prefix="/v1/models", description="Predictions."
)


FEATURE_PARAMETERS = {
    "in": "query",
    "name": "features",
    "description": "One parameter per declared feature of the model, typed by its spec "
    "(numbers as decimals, booleans as true/false, categorical as a level). Unknown "
    "parameters are refused.",
    "schema": {"type": "object", "additionalProperties": {"type": "string"}},
    "style": "form",
    "explode": True,
}
BATCH_BODY = {
    "required": True,
    "content": {"application/json": {"schema": PredictionRequestSchema}},
}


def _json(body: dict[str, Any]) -> Response:
    # Dumped here rather than through the answer schema (the schema documents
    # this exact shape; tests/service/test_predictions_api.py holds the two
    # together), and by orjson: the standard encoder's float repr cost more per
    # answer than parsing the whole request. Every number is finite by now
    # (usecases.predictions checks), so orjson's NaN-as-null never applies.
    return Response(orjson.dumps(body), mimetype="application/json")


def _limits(started: float, app: Flask, environ: dict[str, Any]) -> PredictionLimits:
    """This request's budget, deadline (from ``started``) and client probe."""
    config = app.config
    return PredictionLimits(budget=config["KEELSON_PREDICTION_BUDGET"],
                            deadline_seconds=config["KEELSON_PREDICTION_DEADLINE_SECONDS"],
                            exact_fields=config["KEELSON_SHAPLEY_EXACT_FIELDS"],
                            started=started, client_gone=client_gone_probe(environ))


@blueprint.route("/<model:name>/predictions", methods=["GET"])
@requires("predict")
@blueprint.doc(parameters=[FEATURE_PARAMETERS, {"in": "query", "schema": PredictionQuerySchema}])
@blueprint.response(200, PredictionSchema)
def get_prediction(name: str) -> Response:
    """Score one record given as query parameters, and explain the score.

    Refused with 422 (`urn:keelson:problem:over-budget`, the figures in
    `budget` and `cost`) when its cost (evaluations x network parameters, and
    the answer's bytes) is over the budget per request, and with 422
    (`urn:keelson:problem:output-overflow`) when the output overflows."""
    started = time.monotonic()
    # The app and the request once each: every look through Flask's proxies
    # costs a context lookup, on the hottest route.
    app, current = current_app._get_current_object(), request._get_current_object()  # type: ignore[attr-defined]
    cache = get_version_cache(app)
    entry = find_model(cache, name)
    features, options, key = prediction_readers(entry).read_query(current.args)
    number, baseline, (answer,) = predict(cache, entry, (features,), options,
                                          _limits(started, app, current.environ),
                                          tally=get_drift_tally(app))
    if key is not None:
        _keep(entry.id, number, [key], [features], [answer], ["key"])
    count_served(entry.name, number, options.explain, 1)
    return _json({"model": entry.name, "version": number, "baseline": baseline, **answer})


@blueprint.route("/<model:name>/predictions", methods=["POST"])
@requires("predict")
@blueprint.doc(requestBody=BATCH_BODY,
               parameters=[{"in": "query", "schema": PredictionQuerySchema}])
@blueprint.response(200, PredictionBatchSchema)
def post_predictions(name: str) -> Response:
    """Score a batch of records, in input order, each with its explanation.

    The explanations' `baseline`, the same for every record, is answered once
    beside the `results`. The request's cost is records x evaluations per
    record x network parameters, plus the bytes its answer may take; over the
    budget it is refused with 422
    (`urn:keelson:problem:over-budget`) before any work. Past its deadline it
    ends with 503 (`urn:keelson:problem:deadline-exceeded`, `Retry-After`)."""
    started = time.monotonic()
    app, current = current_app._get_current_object(), request._get_current_object()  # type: ignore[attr-defined]
    cache = get_version_cache(app)
    entry = find_model(cache, name)
    body = read_json_body(current)
    limit = int(app.config["KEELSON_MAX_PREDICTION_BATCH"])
    rows, options, keys = prediction_readers(entry).read_body(body, current.args, limit)
    number, baseline, answers = predict(cache, entry, rows, options,
                                        _limits(started, app, current.environ),
                                        batch=True, tally=get_drift_tally(app))
    if keys is not None:
        keyed = [i for i, key in enumerate(keys) if key is not None]
        _keep(entry.id, number, [keys[i] for i in keyed], [rows[i] for i in keyed],
              [answers[i] for i in keyed], [f"records.{i}.key" for i in keyed])
    count_served(entry.name, number, options.explain, len(rows))
    return _json({"model": entry.name, "version": number, "baseline": baseline,
                  "results": answers})


def _keep(model_id: int, number: int, keys: list[Any], rows: list[dict[str, Any]],
          answers: list[dict[str, Any]], paths: list[str]) -> None:
    """Store the keyed rows as scored cases before answering, and mark each
    answer with its key and whether it was a re-score (in place)."""
    cases = [ScoredCase(key, row, _output(answer["result"]))
             for key, row, answer in zip(keys, rows, answers, strict=True)]
    rescored = keep_cases(get_database().write, model_id, number, cases, paths)
    for key, answer, again in zip(keys, answers, rescored, strict=True):
        answer["key"], answer["rescored"] = key, again


def _output(result: dict[str, Any]) -> Any:
    """What a case keeps of its score: the probabilities, or the value."""
    return result["probabilities"] if "probabilities" in result else result["value"]
