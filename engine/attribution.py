"""Per-field attributions of one prediction, by backpropagation to the inputs.

The explained output is the probability of one class (a binary net's single
logistic unit gives p(class 1); class 0 is 1 - p, so its gradient is the
negative) or, for regression, the value in raw target units. Each method
returns one number per declared field; a categorical field's one-hot columns
are summed.

- `gradient`: d output / d raw feature, in output units per feature unit
  (Simonyan, Vedaldi & Zisserman 2014). A categorical or boolean field has no
  derivative in its own units, so it gets the first-order change from the
  baseline to its value: the sum over its columns of gradient * (x - baseline).
- `gradient_times_input`: gradient * (x - baseline) (Shrikumar et al. 2016).
- `integrated_gradients`: (x - baseline) times the path integral of the
  gradient along the straight line from baseline to x, by the trapezoid rule
  over `steps` intervals, all nodes in one batched backward pass
  (Sundararajan, Taly & Yan 2017). `completeness_gap` is
  |sum(attributions) - (f(x) - f(baseline))|: the quadrature error, falling as
  1/steps^2. Relu gradients jump where a unit switches along the path, which
  would hold a fixed grid to 1/steps; for relu networks the grid is split at
  those points and integrated by the midpoint rule (see `_relu_pieces`).
- `smoothgrad`: the mean gradient at `samples` points x + N(0, noise^2) (noise in
  encoded units, i.e. standard deviations of a numeric field), reported like
  `gradient` (Smilkov et al. 2017).
- `shapley`: each field's Shapley value for v(S) = f(x on S, the baseline
  elsewhere), exact for up to `exact_fields` fields, above that estimated from
  `samples` random orders with standard errors (engine.shapley).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from .encoding import Encoder
from .errors import InvalidInputError
from .input_gradients import explained_pass, gradient_at
from .kernel import Workspace, hidden_preactivations
from .network import Network
from .shapley import exact, sampled

METHODS = ("integrated_gradients", "gradient", "gradient_times_input", "smoothgrad",
           "shapley")
DEFAULT_SAMPLES = 32  # smoothgrad's noisy points when `samples` is not given
EXACT_FIELDS = 12  # shapley: exact up to this many fields
MAX_STEPS = 4096
MAX_SAMPLES = 4096


@functools.lru_cache(maxsize=32)
def _trapezoid(steps: int) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Trapezoid nodes alpha_0..alpha_steps on [0, 1] followed by the path's ends
    1 and 0 (for f(x) and f(baseline)), and the nodes' weights (read-only, cached:
    np.linspace alone costs more than a small backward pass)."""
    alphas = np.concatenate((np.linspace(0.0, 1.0, steps + 1), [1.0, 0.0]))
    weights = np.full(steps + 1, 1.0 / steps)
    weights[0] = weights[-1] = 0.5 / steps
    alphas.flags.writeable = weights.flags.writeable = False
    return alphas, weights


def _relu_pieces(network: Network, baseline: NDArray[np.float64], delta: NDArray[np.float64],
                 steps: int) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Midpoint nodes and widths of the pieces of [0, 1] on which no relu unit
    switches along the path baseline + alpha * delta, within a grid of `steps`.

    A relu network's gradient jumps where a hidden unit crosses zero, which holds a
    fixed grid to 1/steps accuracy. Layer by layer, a unit's pre-activation is
    linear between the crossings already found, so its own crossings follow by
    linear interpolation; on the resulting pieces the gradient is smooth (constant
    before the head), and the midpoint rule is exact for an identity head.
    """
    alphas = np.linspace(0.0, 1.0, steps + 1)
    for layer in range(len(network.sizes) - 2):
        work = network.workspace(alphas.size)
        try:
            _fill_path(work, baseline, delta, alphas)
            z = hidden_preactivations(work, work.inputs, layer).T  # (nodes, units)
            left, unit = np.nonzero(z[:-1] * z[1:] < 0.0)
            if left.size:
                share = z[left, unit] / (z[left, unit] - z[left + 1, unit])
                crossings = alphas[left] + share * (alphas[left + 1] - alphas[left])
                alphas = np.unique(np.concatenate((alphas, crossings)))
        finally:
            network.release(work)
    widths = np.diff(alphas)
    middles = alphas[:-1] + 0.5 * widths
    return np.concatenate((middles, [1.0, 0.0])), widths


def _fill_path(work: Workspace, baseline: NDArray[np.float64], delta: NDArray[np.float64],
               alphas: NDArray[np.float64]) -> None:
    """The workspace's examples: the points baseline + alpha * delta, one per alpha."""
    points = work.examples
    np.multiply(delta[:, None], alphas, points)
    points += baseline[:, None]


def path_rule(network: Network, baseline: NDArray[np.float64], delta: NDArray[np.float64],
              steps: int) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Quadrature for integrated gradients: positions alpha on the path (the m
    nodes, then 1 and 0 for f(x) and f(baseline)) and the nodes' weights (m,)."""
    if network.activation == "relu" and len(network.sizes) > 2:
        return _relu_pieces(network, baseline, delta, steps)
    return _trapezoid(steps)


@dataclass(frozen=True)
class Explanation:
    """One explained prediction; every number in the output's units."""

    method: str
    output: Any
    attributions: dict[str, float]
    baseline: dict[str, Any]
    value: float
    baseline_value: float
    completeness_gap: float | None
    # Sampled Shapley values only: each field's standard error (else None).
    standard_errors: dict[str, float] | None = None

    def as_dict(self) -> dict[str, Any]:
        """The JSON-able form the API answers with."""
        body = {"method": self.method, "output": self.output,
                "attributions": self.attributions, "baseline": self.baseline,
                "value": self.value, "baseline_value": self.baseline_value,
                "completeness_gap": self.completeness_gap}
        if self.method == "shapley":
            body["standard_errors"] = self.standard_errors
        return body


_FLOAT64 = np.dtype(np.float64)


def check_row(name: str, values: Any, width: int) -> NDArray[np.float64]:
    """`values` as a finite float64 row of `width`; InvalidInputError (field `name`)
    otherwise."""
    row: NDArray[np.float64] = values
    # `is` on the native float64 dtype (a singleton): `!= np.float64` converts first.
    if type(values) is not np.ndarray or values.dtype is not _FLOAT64 or values.ndim != 1:
        row = np.asarray(values, dtype=np.float64).reshape(-1)
    if row.shape != (width,):
        raise InvalidInputError(f"{name} must hold {width} encoded values", field=name)
    if not all(map(math.isfinite, row.tolist())):  # cheaper than np.isfinite(row).all()
        raise InvalidInputError(f"{name} must be finite", field=name)
    return row


def _copy_raw(raw: Mapping[str, Any]) -> dict[str, Any]:
    """A copy of a raw baseline, a categorical field's {level: share} copied too."""
    return {name: dict(value) if isinstance(value, dict) else value
            for name, value in raw.items()}


def _check_count(name: str, value: int, largest: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= largest:
        raise InvalidInputError(f"{name} must be an integer from 1 to {largest}", field=name)


def explain(
    network: Network,
    encoder: Encoder,
    x: NDArray[np.float64],
    *,
    method: str,
    output_index: int | None,
    baseline: NDArray[np.float64],
    steps: int = 64,
    samples: int | None = None,
    noise: float = 0.15,
    seed: int = 0,
    raw_baseline: Mapping[str, Any] | None = None,
    exact_fields: int = EXACT_FIELDS,
) -> Explanation:
    """Explain the network's output at one encoded row x (n_inputs,) relative to
    an encoded baseline row (n_inputs,). `output_index` is a class index, or None
    for the class predicted at x (found in the same forward pass); 0 or None for
    regression. `raw_baseline`, if given, is `encoder.raw_baseline(baseline)` of a
    baseline the caller has already passed through `check_row` (a caller that
    explains against one baseline many times keeps both); the explanation gets its
    own copy."""
    if method not in METHODS:
        raise InvalidInputError(f"method must be one of {METHODS}, got {method!r}",
                                field="explain")
    n_inputs = encoder.n_inputs
    if network.sizes[0] != n_inputs or network.sizes[-1] != encoder.n_outputs:
        raise InvalidInputError(f"network {network.sizes} does not fit the encoder's "
                                f"{n_inputs} inputs and {encoder.n_outputs} outputs")
    x = check_row("x", x, n_inputs)
    if raw_baseline is None:
        baseline = check_row("baseline", baseline, n_inputs)
    task = encoder.task
    if output_index is not None:
        n_choices = 1 if task == "regression" else len(encoder.classes)
        if type(output_index) is not int and (isinstance(output_index, bool) or not
                                              isinstance(output_index, np.integer)) \
                or not 0 <= output_index < n_choices:
            raise InvalidInputError(
                f"output index {output_index!r} is outside 0..{n_choices - 1}", field="output")
        output_index = int(output_index)
    # A binary head has one unit, p(class 1); class 0 is 1 - p.
    unit = output_index if task == "multiclass" else 0

    errors = None
    if method == "shapley":
        if len(encoder.fields) <= exact_fields:
            unit, value, baseline_value, columns, errors = exact(
                network, encoder, x, baseline, unit)
        elif samples is None:
            raise InvalidInputError(
                f"exact Shapley values take at most {exact_fields} fields and this model "
                f"has {len(encoder.fields)}: give samples to estimate them", field="samples")
        else:
            _check_count("samples", samples, MAX_SAMPLES)
            unit, value, baseline_value, columns, errors = sampled(
                network, encoder, x, baseline, unit, samples, seed)
    elif method == "integrated_gradients":
        _check_count("steps", steps, MAX_STEPS)
        delta = x - baseline
        alphas, rule = path_rule(network, baseline, delta, steps)
        # Quadrature nodes, then x, then the baseline (alphas ends with 1 and 0).
        work = network.workspace(alphas.size, rule.size)
        try:
            _fill_path(work, baseline, delta, alphas)
            unit, value, baseline_value, gradient = explained_pass(network, work, unit, rule)
        finally:
            network.release(work)
        columns = gradient * delta
    else:
        if method == "smoothgrad":
            samples = DEFAULT_SAMPLES if samples is None else samples
            _check_count("samples", samples, MAX_SAMPLES)
            if not math.isfinite(noise) or noise < 0.0:
                raise InvalidInputError("noise must be a finite number >= 0", field="noise")
            noisy = np.random.default_rng(seed).standard_normal((samples, n_inputs))
            noisy *= noise
            noisy += x
            work = network.workspace(samples + 2, samples)
            try:
                points = work.examples
                points[:, :samples] = noisy.T
                points[:, -2], points[:, -1] = x, baseline
                unit, value, baseline_value, gradient = explained_pass(
                    network, work, unit, np.full(samples, 1.0 / samples))
            finally:
                network.release(work)
        else:
            unit, value, baseline_value, gradient = gradient_at(network, x, baseline, unit)
        if method == "gradient_times_input":
            columns = gradient * (x - baseline)
        elif encoder.all_numeric:
            columns = gradient / encoder.scale  # per raw unit: encoded = (raw - center) / scale
        else:
            # Numeric columns per raw unit; one-hot and boolean columns the
            # first-order change from the baseline to x.
            columns = np.where(encoder.column_numeric, gradient / encoder.scale,
                               gradient * (x - baseline))

    if encoder.n_inputs != len(encoder.fields) and method != "shapley":  # (per field)
        columns = encoder.group(columns)
    label: Any = None
    if task == "regression":
        # Raw target units: value = standardised output * target_scale + target_center.
        columns = columns * encoder.target_scale
        if errors is not None:
            errors = errors * abs(encoder.target_scale)
        value = value * encoder.target_scale + encoder.target_center
        baseline_value = baseline_value * encoder.target_scale + encoder.target_center
    elif task == "binary":
        # The predicted class at a tie p = 0.5 is class 0, as argmax of [1 - p, p] gives.
        index = output_index if output_index is not None else int(value > 0.5)
        label = encoder.label_of(index)
        if index == 0:
            columns = -columns
            value, baseline_value = 1.0 - value, 1.0 - baseline_value
    else:
        label = encoder.label_of(unit)
    gap = None
    if method in ("integrated_gradients", "shapley"):
        gap = abs(float(np.add.reduce(columns)) - (value - baseline_value))  # = sum()
    return Explanation(
        method=method,
        output=label,
        # One value per field by construction (grouped above): strict=True would only
        # re-check that, for about a third more than building the dict costs.
        attributions=dict(zip(encoder.fields, columns.tolist(), strict=False)),
        baseline=encoder.raw_baseline(baseline) if raw_baseline is None else
        dict(raw_baseline) if encoder.all_numeric else _copy_raw(raw_baseline),
        value=value,
        baseline_value=baseline_value,
        completeness_gap=gap,
        standard_errors=None if errors is None else
        dict(zip(encoder.fields, errors.tolist(), strict=True)),
    )
