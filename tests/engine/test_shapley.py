"""Shapley values (explain=shapley): the axioms of Shapley (1953), the definition
evaluated directly, and permutation sampling (Strumbelj & Kononenko 2014)
converging to the exact values.

Sources: L. S. Shapley, "A Value for n-Person Games", Contributions to the Theory
of Games II (1953): efficiency, symmetry, the dummy (null player) axiom and the
value formula. E. Strumbelj & I. Kononenko, "Explaining prediction models and
individual predictions with feature contributions", Knowledge and Information
Systems 41 (2014): the permutation estimate, its mean and variance.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from engine.attribution import explain
from engine.encoding import Encoder
from engine.errors import InvalidInputError
from engine.network import Network
from engine.spec import apply_defaults
from tests.engine.test_attribution import setup


def direct_shapley(network: Network, encoder: Encoder, x: np.ndarray, baseline: np.ndarray,
                   unit: int) -> np.ndarray:
    """The value formula of Shapley (1953) evaluated subset by subset, one
    network.forward per coalition (independent of engine.shapley's batching and
    weight matrix)."""
    d = len(encoder.fields)

    def v(coalition: tuple[int, ...]) -> float:
        point = baseline.copy()
        for field in coalition:
            columns = encoder.column_field == field
            point[columns] = x[columns]
        return float(network.forward(point[None, :])[0, unit])

    phi = np.zeros(d)
    for i in range(d):
        others = [j for j in range(d) if j != i]
        for size in range(d):
            weight = math.factorial(size) * math.factorial(d - size - 1) / math.factorial(d)
            for coalition in itertools.combinations(others, size):
                phi[i] += weight * (v((*coalition, i)) - v(coalition))
    return phi


@pytest.mark.parametrize("task", ["binary", "multiclass", "regression"])
@pytest.mark.parametrize("activation", ["tanh", "relu", "logistic"])
def test_values_add_up_to_the_change_from_the_baseline(task: str, activation: str) -> None:
    # Efficiency (Shapley 1953): the values sum to v(all) - v(none).
    encoder, network, X = setup(task, activation=activation)
    baseline = X.mean(axis=0)
    for row in (0, 7, 21):
        result = explain(network, encoder, X[row], method="shapley", output_index=None,
                         baseline=baseline)
        total = sum(result.attributions.values())
        assert abs(total - (result.value - result.baseline_value)) <= 1e-12
        assert result.completeness_gap is not None and result.completeness_gap <= 1e-12
        assert result.standard_errors is None  # exact: nothing estimated
        assert result.value == pytest.approx(
            explain(network, encoder, X[row], method="gradient", output_index=None,
                    baseline=baseline).value, rel=1e-14)


@pytest.mark.parametrize("task", ["binary", "multiclass", "regression"])
def test_exact_values_equal_the_formula_evaluated_coalition_by_coalition(task: str) -> None:
    encoder, network, X = setup(task)
    baseline = X.mean(axis=0)
    index = 2 if task == "multiclass" else 0
    result = explain(network, encoder, X[4], method="shapley",
                     output_index=index if task != "binary" else 1, baseline=baseline)
    expected = direct_shapley(network, encoder, X[4], baseline, index)
    if task == "regression":
        expected = expected * encoder.target_scale
    got = np.array([result.attributions[name] for name in encoder.fields])
    np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-14)


def twin_setup(hidden: tuple[int, ...]) -> tuple[Encoder, Network, np.ndarray]:
    """A regression model of inflow and outflow (numeric, the same warm-up values,
    so the same scaling), a categorical and a boolean field."""
    features = [{"name": "inflow_m3h", "type": "numeric"},
                {"name": "outflow_m3h", "type": "numeric"},
                {"name": "pump_family", "type": "categorical",
                 "levels": ["centrifugal", "screw", "piston"]},
                {"name": "has_vfd", "type": "boolean"}]
    spec = apply_defaults({"name": "m", "task": "regression", "target": "y",
                           "features": features, "hidden_layers": list(hidden)})
    rng = np.random.default_rng(5)
    flows = rng.uniform(10, 90, 40).tolist()
    rows = [{"inflow_m3h": f, "outflow_m3h": f, "pump_family": ["centrifugal", "screw",
             "piston"][i % 3], "has_vfd": bool(i % 2)} for i, f in enumerate(flows)]
    encoder = Encoder.from_spec(spec, warmup=rows,
                                warmup_labels=rng.normal(50, 9, 40).tolist())
    network = Network.create((encoder.n_inputs, *hidden, 1), "tanh", "identity",
                             np.random.default_rng(6))
    network.params[:] = np.random.default_rng(7).normal(0.0, 0.7, network.params.size)
    return encoder, network, encoder.encode(rows)


def test_two_identical_fields_get_equal_values() -> None:
    # Symmetry (Shapley 1953): interchangeable players get the same value.
    encoder, network, X = twin_setup((6, 4))
    first = network.layers[0]
    first[1, :] = first[0, :]  # outflow's weights out are inflow's
    x = X[3].copy()
    baseline = X.mean(axis=0)
    x[1], baseline[1] = x[0], baseline[0]
    result = explain(network, encoder, x, method="shapley", output_index=0, baseline=baseline)
    assert result.attributions["inflow_m3h"] != 0.0
    assert result.attributions["inflow_m3h"] == pytest.approx(
        result.attributions["outflow_m3h"], rel=1e-12, abs=1e-15)


def test_a_field_with_no_weights_out_gets_zero() -> None:
    # Dummy player (Shapley 1953): v(S + i) = v(S) for every S gives 0.
    encoder, network, X = twin_setup((6, 4))
    columns = encoder.column_field == encoder.fields.index("pump_family")
    network.layers[0][:-1][columns] = 0.0
    baseline = X.mean(axis=0)
    for row in (0, 1, 2):
        result = explain(network, encoder, X[row], method="shapley", output_index=0,
                         baseline=baseline)
        assert result.attributions["pump_family"] == 0.0
        assert max(abs(v) for v in result.attributions.values()) > 1e-3


def test_a_linear_model_gives_each_field_its_weight_times_its_change() -> None:
    # An additive game: each player's value is its own term, w . (x - b) in raw
    # target units (follows from Shapley 1953's formula; a one-hot field's
    # columns together).
    encoder, network, X = twin_setup(())
    baseline = X.mean(axis=0)
    weights = network.layers[0][:-1, 0]
    for row in (0, 5, 9):
        result = explain(network, encoder, X[row], method="shapley", output_index=0,
                         baseline=baseline)
        terms = weights * (X[row] - baseline) * encoder.target_scale
        for index, name in enumerate(encoder.fields):
            expected = float(terms[encoder.column_field == index].sum())
            assert result.attributions[name] == pytest.approx(expected, rel=1e-12, abs=1e-12)


@pytest.mark.parametrize("task", ["binary", "regression"])
def test_sampled_values_converge_to_the_exact_ones_within_their_standard_errors(
        task: str) -> None:
    # Strumbelj & Kononenko (2014): the permutation estimate is unbiased with
    # variance sigma^2 / samples. exact_fields=0 forces sampling of a small game.
    encoder, network, X = setup(task)
    baseline = X.mean(axis=0)
    exact = explain(network, encoder, X[2], method="shapley", output_index=None,
                    baseline=baseline)
    previous = None
    for samples in (100, 1600):
        estimate = explain(network, encoder, X[2], method="shapley", output_index=None,
                           baseline=baseline, samples=samples, seed=3, exact_fields=0)
        assert estimate.standard_errors is not None
        errors = estimate.standard_errors
        for name in encoder.fields:
            assert abs(estimate.attributions[name] - exact.attributions[name]) \
                <= 4 * errors[name] + 1e-12
        # Each order's contributions telescope: efficiency holds for the estimate too.
        assert estimate.completeness_gap is not None and estimate.completeness_gap <= 1e-12
        mean_error = float(np.mean(list(errors.values())))
        if previous is not None:  # 16x the orders: about a quarter of the error
            assert 0.15 * previous <= mean_error <= 0.4 * previous
        previous = mean_error
    again = explain(network, encoder, X[2], method="shapley", output_index=None,
                    baseline=baseline, samples=1600, seed=3, exact_fields=0)
    assert again == estimate  # the seed fixes the orders


def test_more_fields_than_the_exact_limit_need_samples() -> None:
    encoder, network, X = setup("binary")
    baseline = X.mean(axis=0)
    with pytest.raises(InvalidInputError) as refused:
        explain(network, encoder, X[0], method="shapley", output_index=1, baseline=baseline,
                exact_fields=3)
    assert refused.value.field == "samples"
    for samples in (1, 0, 5000):
        with pytest.raises(InvalidInputError) as refused:
            explain(network, encoder, X[0], method="shapley", output_index=1,
                    baseline=baseline, exact_fields=3, samples=samples)
        assert refused.value.field == "samples"
    sampled = explain(network, encoder, X[0], method="shapley", output_index=1,
                      baseline=baseline, exact_fields=3, samples=8)
    assert sampled.standard_errors is not None and set(sampled.standard_errors) == set(
        encoder.fields)
    assert sampled.as_dict()["standard_errors"] == sampled.standard_errors


def test_thirteen_fields_sampled_in_several_batches_keep_efficiency() -> None:
    features = [{"name": f"sensor_{i}", "type": "numeric"} for i in range(13)]
    spec = apply_defaults({"name": "m", "task": "binary", "target": "y",
                           "features": features, "hidden_layers": [5]})
    rng = np.random.default_rng(11)
    rows = [{f"sensor_{i}": float(v) for i, v in enumerate(r)}
            for r in rng.normal(0, 1, (30, 13))]
    encoder = Encoder.from_spec(spec, warmup=rows)
    network = Network.create((13, 5, 1), "tanh", "logistic", np.random.default_rng(12))
    X = encoder.encode(rows)
    # 400 orders x 13 rows: two forward batches.
    result = explain(network, encoder, X[0], method="shapley", output_index=None,
                     baseline=X.mean(axis=0), samples=400)
    assert result.completeness_gap is not None and result.completeness_gap <= 1e-12
