"""Use case: score validated feature rows with a version and explain each score.

Read-only. The version cache picks the network (no query when warm); this turns
its numbers into the bodies of docs/http-api.md ("Predictions"), and the cache's lookups
into the errors the API answers with.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, fields
from typing import Any

import numpy as np
import orjson

import engine
from service.errors import ConflictError, InvalidInputError, KeelsonError, NotFoundError
from service.usecases.common import is_model_name, no_such_model
from service.usecases.drift_tally import DriftTally
from service.usecases.prediction_limits import PredictionLimits
from service.usecases.pruned import snapshot_pruned
from service.versions.cache import (
    LoadedVersion,
    ModelEntry,
    ModelNotFound,
    NoActiveVersion,
    SnapshotPruned,
    SnapshotUnreadable,
    VersionCache,
    VersionNotFound,
)

# The engine's attribution methods, and "none": score without explaining.
EXPLAIN_METHODS = (*engine.EXPLANATION_METHODS, "none")
DEFAULT_EXPLAIN = "integrated_gradients"
DEFAULT_STEPS, MIN_STEPS, MAX_STEPS = 64, 2, 1024
MAX_SAMPLES = 1024
DEFAULT_NOISE, MAX_NOISE = 0.15, 10.0


@dataclass(frozen=True, slots=True)
class PredictionOptions:
    """The optional parameters of a prediction request, already validated.

    ``output`` is the class itself (``True``, ``"failed"``), resolved from the
    request's spelling by the model's reader; ``None`` means the predicted class.
    """

    explain: str = DEFAULT_EXPLAIN
    version: int | None = None
    output: Any = None
    steps: int = DEFAULT_STEPS
    samples: int | None = None  # SmoothGrad: the engine's default; shapley: exact
    noise: float = DEFAULT_NOISE
    seed: int = 0


# The options' names: query parameters of GET predictions beside the features.
OPTION_NAMES = tuple(option.name for option in fields(PredictionOptions))
# The case key of a scored case: a query parameter of GET predictions beside
# the options (``"key"`` on each record of a POST).
CASE_KEY = "key"
# Every query parameter of GET predictions that is not a feature: a spec may
# not declare a feature by one of these names (service/web/schemas/spec.py).
QUERY_NAMES = (*OPTION_NAMES, CASE_KEY)


class VersionUnavailableError(KeelsonError):
    """The version exists but cannot serve (its snapshot does not load)."""

    status = 503


class NonFiniteOutputError(KeelsonError):
    """The network's output or explanation overflowed to infinity or NaN for
    the request's inputs (valid ones, far outside what the model learned
    from): not JSON (RFC 8259), never served. The weights are finite (every
    snapshot is checked on load), so only the inputs can have driven it."""

    status = 422
    problem_type = "urn:keelson:problem:output-overflow"


def find_model(cache: VersionCache, name: str) -> ModelEntry:
    """The cached model called ``name`` (its active pointer at most the bound old)."""
    if not is_model_name(name):
        raise no_such_model(name)
    try:
        return cache.model(name)
    except ModelNotFound:
        raise no_such_model(name) from None


def predict(
    cache: VersionCache,
    entry: ModelEntry,
    rows: Sequence[Mapping[str, Any]],
    options: PredictionOptions,
    limits: PredictionLimits | None = None,
    *,
    batch: bool = False,
    tally: DriftTally | None = None,
) -> tuple[int, dict[str, Any] | None, list[dict[str, Any]]]:
    """The serving version's number, the explanations' baseline (None when
    nothing is explained) and ``{"result", "explanation"}`` per row, in order.

    The baseline is the version's own (the mean of what it learned from), the
    same for every row: answered once, not per row, where a categorical
    field's {level: share} made each record's answer kilobytes long (a 2.2 MB
    request once drew a 95.7 MB answer).

    Engine inference allocates per call and keeps no state between calls, so
    one cached network serves concurrent requests without a lock. ``limits``
    refuses a request over budget before any work and ends one past its
    deadline, or whose client left, between records (prediction_limits.py).
    ``batch``: rows came as ``records`` of a body (errors name ``records.N``).
    ``tally``: this process's drift counts, which see every row answered
    here, against the model's active version (in memory; no database write).
    """
    loaded = load_version(cache, entry, options.version)
    learner = loaded.learner
    exact_fields = engine.SHAPLEY_EXACT_FIELDS if limits is None else limits.exact_fields
    if options.explain == "shapley":
        _check_shapley(len(learner.encoder.fields), options.samples, exact_fields)
    if limits is not None:
        explained, errors = options.explain != "none", options.explain == "shapley"
        sizes = loaded.derived.get(("answer_sizes", explained, errors))
        if sizes is None:  # the same for every request to this version
            network = learner.network
            sizes = loaded.derived[("answer_sizes", explained, errors)] = (
                network.params.size, sum(network.sizes[1:]),
                answer_sizes(learner, explained, errors))
        parameters, units, (once, per_record) = sizes
        limits.check_cost(len(rows), options.explain, options.steps, options.samples,
                          parameters, units, once + len(rows) * per_record,
                          len(learner.encoder.fields))
    encoded = learner.encode(rows)
    scores = learner.predict(encoded)
    classes = learner.classes if learner.task != "regression" else None
    answers = []
    baseline = None
    for index in range(len(rows)):
        if index and limits is not None:
            limits.between_records(index, len(rows))
        try:
            if classes is not None:
                result, predicted = _classification(classes, scores[index])
                output = predicted if options.output is None else options.output
            else:
                result, output = _regression(scores[index]), None
        except NonFiniteOutputError:
            raise _overflow(learner, rows[index], encoded[index], index, batch,
                            "output") from None
        explanation = None
        if options.explain != "none":
            try:
                explained = learner.explain(
                    encoded[index], method=options.explain, output=output,
                    steps=options.steps, samples=options.samples, noise=options.noise,
                    seed=options.seed, exact_fields=exact_fields)
                explanation = _explanation(explained)
                if baseline is None:
                    baseline = _answered_baseline(loaded, explained.baseline)
            except NonFiniteOutputError:
                raise _overflow(learner, rows[index], encoded[index], index, batch,
                                "explanation") from None
        answers.append({"result": result, "explanation": explanation})
    if tally is not None:  # answered: counted (a refused or failed request is not)
        tally.observe(entry.id, entry.active_version_id, rows)
    return loaded.number, baseline, answers


def _check_shapley(fields: int, samples: int | None, exact_fields: int) -> None:
    """InvalidInputError (422, before any work) for Shapley values the engine
    would refuse: more fields than the exact limit without ``samples``, or a
    single sample (whose standard error is undefined)."""
    if fields <= exact_fields:
        return
    if samples is None:
        raise InvalidInputError(
            f"This model has {fields} fields: exact Shapley values are computed for at most "
            f"{exact_fields} fields (2^{exact_fields} coalitions). Give samples (random "
            "orders of the fields, at least 2) to estimate them with standard errors.",
            errors={"samples": [f"Required for explain=shapley over more than {exact_fields} "
                                "fields."]})
    if samples < 2:
        raise InvalidInputError(
            "Sampled Shapley values need at least 2 samples: one order of the fields "
            "gives no standard error.", errors={"samples": ["At least 2 for explain=shapley."]})


# The longest number an answer holds ("-2.2250738585072014e-308") and its
# separator; the members every record's answer has beside its numbers and
# names (member names, the method, the brackets).
NUMBER_BYTES = 25
RECORD_BYTES = 160


def answer_bytes(learner: Any, records: int, explained: bool,
                 standard_errors: bool = False) -> int:
    """At most how many bytes the answer of ``records`` rows takes (``answer_sizes``)."""
    once, per_record = answer_sizes(learner, explained, standard_errors)
    return once + records * per_record


def answer_sizes(learner: Any, explained: bool, standard_errors: bool = False
                 ) -> tuple[int, int]:
    """At most how many bytes an answer takes, as (bytes once, bytes per
    record): per record a probability per class (each named) or a value, and
    when ``explained`` an attribution per field (and with ``standard_errors``,
    Shapley values', a standard error per field too); once, the baseline.
    Priced into the request's budget (prediction_limits.py); the figures are
    the version's own, kept with it in the cache (``predict``)."""
    per_record = RECORD_BYTES + NUMBER_BYTES
    if learner.task != "regression":
        keys = [class_key(c) for c in learner.classes]
        # The probabilities' keys, and the label and the explained output (at
        # most 6 bytes a character, quoted).
        longest = 2 + 6 * max(map(len, keys))
        per_record += len(orjson.dumps(keys)) + 2 * longest + NUMBER_BYTES * len(keys)
    once = RECORD_BYTES
    if explained:
        encoder = learner.encoder
        fields = orjson.dumps(encoder.fields)
        per_record += len(fields) + NUMBER_BYTES * (len(encoder.fields) + 3)
        if standard_errors:  # the member's name, then the fields again
            per_record += RECORD_BYTES + len(fields) + NUMBER_BYTES * len(encoder.fields)
        levels = [str(level) for name in encoder.fields for level in encoder.levels.get(name, ())]
        once += len(fields) + len(orjson.dumps(levels)) + NUMBER_BYTES * (
            len(encoder.fields) + len(levels))
    return once, per_record


def _overflow(learner: Any, row: Mapping[str, Any], encoded: Any, index: int, batch: bool,
              what: str) -> NonFiniteOutputError:
    """The 422 for a record whose ``what`` overflowed, naming the numeric
    fields furthest from the centre of the model's encoding (in its own scale
    units: the ones that drove the overflow), at most three."""
    encoder = learner.encoder
    numeric = np.flatnonzero(encoder.column_numeric)
    distance = np.abs(encoded[numeric])
    order = numeric[np.argsort(-distance, kind="stable")]
    furthest = float(distance.max()) if len(numeric) else 0.0
    names = [encoder.fields[encoder.column_field[column]] for column in order
             if abs(float(encoded[column])) >= 0.01 * furthest][:3]
    where = f"records.{index}" if batch else "these inputs"
    detail = (f"The model's {what} overflows for {where}: the values are so far outside "
              "the range it learned from that its arithmetic leaves the range of "
              "64-bit floating point.")
    if names:
        detail += " Furthest out: " + ", ".join(f"{name} = {row[name]!r}" for name in names) \
            + "."
    prefix = f"records.{index}.features." if batch else ""
    message = f"Too far outside the range the model learned from: its {what} overflows."
    return NonFiniteOutputError(detail, errors={f"{prefix}{name}": [message] for name in names}
                                or None)


def load_version(cache: VersionCache, entry: ModelEntry, number: int | None) -> LoadedVersion:
    try:
        return cache.version(entry, number)
    except NoActiveVersion:
        raise ConflictError(
            f"Model {entry.name!r} has no active version yet: send records and let the "
            "worker write one, or promote a version.") from None
    except VersionNotFound as exc:
        raise NotFoundError(f"Model {entry.name!r} has no version {exc.number}.",
                            errors={"version": [f"No version {exc.number}."]}) from None
    except SnapshotPruned as exc:
        raise snapshot_pruned(entry.name, exc.number, exc.pruned_at) from None
    except SnapshotUnreadable as exc:
        raise VersionUnavailableError(
            f"Version {exc.number} of model {entry.name!r} cannot be loaded (its stored "
            "snapshot is unreadable; the error is logged). Promote another version.") from None


def class_key(label: Any) -> str:
    """How a class is spelled as a JSON object key: booleans as ``false``/``true``."""
    if isinstance(label, bool):
        return "true" if label else "false"
    return str(label)


def _classification(classes: Sequence[Any], scores: Any) -> tuple[dict[str, Any], Any]:
    probabilities = {}
    best, best_p = 0, -1.0
    for position, p in enumerate(scores.tolist()):
        if not math.isfinite(p):
            raise NonFiniteOutputError("The model answered a probability that is not finite.")
        probabilities[class_key(classes[position])] = p
        if p > best_p:
            best, best_p = position, p
    return {"label": classes[best], "probabilities": probabilities}, classes[best]


def _regression(scores: Any) -> dict[str, Any]:
    return {"value": _finite(scores[0])}


def _explanation(explained: Any) -> dict[str, Any]:
    gap = explained.completeness_gap
    body = {
        "method": explained.method,
        "output": explained.output,
        "attributions": {name: _finite(v) for name, v in explained.attributions.items()},
        "completeness_gap": None if gap is None else _finite(gap),
        "value": _finite(explained.value),
        "baseline_value": _finite(explained.baseline_value),
    }
    if explained.method == "shapley":  # sampled: each value's standard error
        errors = explained.standard_errors
        body["standard_errors"] = None if errors is None else {
            name: _finite(v) for name, v in errors.items()}
    return body


def _finite(value: Any) -> float:
    number = float(value)
    if not math.isfinite(number):
        raise NonFiniteOutputError("The model answered a number that is not finite.")
    return number


def _answered_baseline(loaded: LoadedVersion, raw: Mapping[str, Any]) -> dict[str, Any]:
    """The explanations' baseline as answered: the version's own (the mean of
    what it learned from, ``raw``), made once per cached version and shared by
    every answer (dumped, never changed)."""
    baseline: dict[str, Any] | None = loaded.derived.get("baseline")
    if baseline is None:
        baseline = loaded.derived["baseline"] = {name: _baseline(v) for name, v in raw.items()}
    return baseline


def _baseline(value: Any) -> Any:
    # Numeric: raw units; boolean: the share of true; categorical: {level: share}.
    if isinstance(value, Mapping):
        return {str(level): _finite(share) for level, share in value.items()}
    return _finite(value)
