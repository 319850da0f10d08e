"""Attributions against outside references: the axioms of integrated gradients
(Sundararajan, Taly & Yan, ICML 2017), SmoothGrad's limit (Smilkov et al. 2017),
finite differences, and PyTorch autograd."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from engine.attribution import METHODS, explain, path_rule
from engine.encoding import Encoder
from engine.network import Network
from engine.spec import apply_defaults

HEAD = {"binary": "logistic", "multiclass": "softmax", "regression": "identity"}
FEATURES = [
    {"name": "vibration_rms", "type": "numeric", "min": 0, "max": 100},
    {"name": "pump_family", "type": "categorical", "levels": ["centrifugal", "screw", "piston"]},
    {"name": "has_vfd", "type": "boolean"},
    {"name": "head_m", "type": "numeric"},
    {"name": "flow_lps", "type": "numeric"},
]


def random_rows(n: int, seed: int) -> list[dict[str, object]]:
    rng = np.random.default_rng(seed)
    families = ["centrifugal", "screw", "piston"]
    return [{"vibration_rms": float(rng.uniform(0, 100)),
             "pump_family": families[int(rng.integers(3))],
             "has_vfd": bool(rng.integers(2)),
             "head_m": float(rng.normal(40, 7)),
             "flow_lps": float(rng.gamma(4.0, 3.0))} for _ in range(n)]


def setup(task: str, hidden: tuple[int, ...] = (12, 6), activation: str = "tanh",
          seed: int = 0, weight_std: float | None = 0.7,
          ) -> tuple[Encoder, Network, list[dict[str, object]]]:
    """Encoder, network and raw rows; weights N(0, weight_std^2), or the engine's
    Glorot/He initialisation when weight_std is None."""
    spec = {"name": "m", "task": task, "target": "y", "features": FEATURES}
    if task == "multiclass":
        spec["classes"] = ["low", "mid", "high"]
    rows = random_rows(80, seed)
    labels = np.random.default_rng(seed).normal(80, 12, 80).tolist()
    encoder = Encoder.from_spec(apply_defaults(spec), warmup=rows,
                                warmup_labels=labels if task == "regression" else ())
    network = Network.create((encoder.n_inputs, *hidden, encoder.n_outputs), activation,
                             HEAD[task], np.random.default_rng(seed + 1))
    if weight_std is not None:
        network.params[:] = np.random.default_rng(seed + 2).normal(0.0, weight_std,
                                                                   network.params.size)
    return encoder, network, rows


def raw_output(encoder: Encoder, network: Network, row: dict[str, object], index: int) -> float:
    """The explained output of one raw row: class probability or raw value."""
    out = network.forward(encoder.encode([row]))[0]
    if encoder.task == "regression":
        return float(encoder.decode_values(out)[0])
    if encoder.task == "binary":
        return float(out[0]) if index == 1 else 1.0 - float(out[0])
    return float(out[index])


TASK_OUTPUT = [("binary", 1), ("binary", 0), ("multiclass", 2), ("regression", 0)]


@pytest.mark.parametrize(("task", "index"), TASK_OUTPUT)
@pytest.mark.parametrize("activation", ["tanh", "logistic", "relu"])
def test_integrated_gradients_are_complete_at_64_steps(task: str, index: int,
                                                       activation: str) -> None:
    # Completeness: sum of attributions = f(x) - f(baseline) (Sundararajan et al. 2017);
    # with 64 steps the gap is below 1e-3 of the change (freshly initialised network).
    encoder, network, rows = setup(task, activation=activation, weight_std=None)
    X = encoder.encode(rows)
    baseline = X.mean(axis=0)
    for x in X[:40]:
        result = explain(network, encoder, x, method="integrated_gradients",
                         output_index=index, baseline=baseline)
        change = result.value - result.baseline_value
        assert result.completeness_gap is not None
        assert result.completeness_gap < 1e-3 * abs(change)
        assert result.completeness_gap == pytest.approx(
            abs(sum(result.attributions.values()) - change), abs=1e-12)


@pytest.mark.parametrize("steps", [1, 4, 64])
@pytest.mark.parametrize("hidden", [(9,), (12, 8, 6)])
def test_integrated_gradients_of_a_piecewise_linear_relu_network_are_exact(
        steps: int, hidden: tuple[int, ...]) -> None:
    # A relu network with an identity head is linear on each piece of the path
    # between the points where a unit switches; split there, the path integral is
    # exact and so is completeness (Sundararajan et al. 2017), at any step count.
    encoder, network, rows = setup("regression", hidden=hidden, activation="relu")
    X = encoder.encode(rows)
    for x in X[:10]:
        result = explain(network, encoder, x, method="integrated_gradients", output_index=0,
                         baseline=X.mean(axis=0), steps=steps)
        assert result.completeness_gap is not None
        assert result.completeness_gap < 1e-9 * max(1.0, abs(result.value))


@pytest.mark.parametrize(("task", "index"), TASK_OUTPUT)
def test_the_completeness_gap_shrinks_as_steps_grow(task: str, index: int) -> None:
    # Sundararajan et al. (2017): the Riemann (here trapezoid) approximation of the
    # path integral converges as steps grow.
    encoder, network, rows = setup(task, seed=3)
    X = encoder.encode(rows)
    gaps = [explain(network, encoder, X[5], method="integrated_gradients", output_index=index,
                    baseline=X.mean(axis=0), steps=steps).completeness_gap
            for steps in (4, 16, 64, 256)]
    assert gaps[0] > gaps[1] > gaps[2] > gaps[3]


@pytest.mark.parametrize("target_scale_from_labels", [False, True])
def test_integrated_gradients_equal_weight_times_difference_for_a_linear_model(
        target_scale_from_labels: bool) -> None:
    # Linearity: for f(x) = w.x + b, integrated gradients are w * (x - baseline)
    # exactly, summed over a field's columns (Sundararajan et al. 2017).
    encoder, network, rows = setup("regression", hidden=(), seed=5)
    if not target_scale_from_labels:
        encoder.target_center, encoder.target_scale = 0.0, 1.0
    X = encoder.encode(rows)
    x, baseline = X[7], X[:20].mean(axis=0)
    w = network.weights[0][:, 0]
    expected = encoder.group(w * (x - baseline)) * encoder.target_scale
    for steps in (1, 3, 64):
        result = explain(network, encoder, x, method="integrated_gradients", output_index=0,
                         baseline=baseline, steps=steps)
        np.testing.assert_allclose(list(result.attributions.values()), expected,
                                   rtol=1e-12, atol=1e-12)
        assert result.completeness_gap is not None and result.completeness_gap < 1e-9
    # The same in raw units for the numeric fields: (w / scale) * (raw x - raw baseline).
    raw_x, raw_b = rows[7], encoder.raw_baseline(baseline)
    for name in ("vibration_rms", "head_m", "flow_lps"):
        column = int(np.flatnonzero(encoder.column_field == encoder.fields.index(name))[0])
        raw_change = float(raw_x[name]) - raw_b[name]  # type: ignore[arg-type]
        assert result.attributions[name] == pytest.approx(
            w[column] / encoder.scale[column] * raw_change * encoder.target_scale, rel=1e-9)


@pytest.mark.parametrize(("task", "index"), TASK_OUTPUT)
@pytest.mark.parametrize("ignored", ["pump_family", "head_m", "has_vfd"])
def test_a_field_the_network_ignores_gets_zero_attribution(task: str, index: int,
                                                            ignored: str) -> None:
    # Dummy (sensitivity) axiom: a feature the function does not depend on gets zero
    # (Sundararajan et al. 2017). Zeroing its first-layer weights removes it.
    encoder, network, rows = setup(task, seed=7)
    field = encoder.fields.index(ignored)
    network.weights[0][encoder.column_field == field, :] = 0.0
    X = encoder.encode(rows)
    for method in METHODS:
        result = explain(network, encoder, X[1], method=method, output_index=index,
                         baseline=X.mean(axis=0))
        assert result.attributions[ignored] == 0.0
        assert any(value != 0.0 for value in result.attributions.values())


@pytest.mark.parametrize(("task", "index"), TASK_OUTPUT)
def test_smoothgrad_tends_to_the_gradient_as_noise_vanishes(task: str, index: int) -> None:
    # SmoothGrad is the mean gradient under Gaussian noise; as noise -> 0 it is the
    # gradient (Smilkov et al. 2017).
    encoder, network, rows = setup(task, seed=9)
    X = encoder.encode(rows)
    kwargs = {"output_index": index, "baseline": X.mean(axis=0)}
    gradient = np.array(list(explain(network, encoder, X[4], method="gradient",
                                     **kwargs).attributions.values()))
    errors = []
    for noise in (0.3, 0.03, 0.003, 0.0):
        smooth = explain(network, encoder, X[4], method="smoothgrad", noise=noise,
                         samples=64, **kwargs)
        errors.append(np.abs(np.array(list(smooth.attributions.values())) - gradient).max())
    assert errors[0] > errors[1] > errors[2]
    assert errors[2] < 1e-2 * np.abs(gradient).max()
    assert errors[3] < 1e-12 * np.abs(gradient).max()


@pytest.mark.parametrize(("task", "index"), TASK_OUTPUT)
@pytest.mark.parametrize("activation", ["tanh", "logistic"])
def test_gradient_equals_a_central_finite_difference_in_raw_units(task: str, index: int,
                                                                  activation: str) -> None:
    # Numerical differentiation of the served output: common practice, no source.
    encoder, network, rows = setup(task, activation=activation, seed=11)
    X = encoder.encode(rows)
    baseline = X.mean(axis=0)
    for r in (0, 3):
        result = explain(network, encoder, X[r], method="gradient", output_index=index,
                         baseline=baseline)
        for name in ("vibration_rms", "head_m", "flow_lps"):
            h = 1e-5 * max(1.0, abs(float(rows[r][name])))  # type: ignore[arg-type]
            up = raw_output(encoder, network, {**rows[r], name: float(rows[r][name]) + h},
                            index)  # type: ignore[arg-type]
            down = raw_output(encoder, network, {**rows[r], name: float(rows[r][name]) - h},
                              index)  # type: ignore[arg-type]
            assert result.attributions[name] == pytest.approx((up - down) / (2 * h),
                                                              rel=1e-6, abs=1e-10)


@pytest.mark.parametrize(("task", "index"), TASK_OUTPUT)
@pytest.mark.parametrize("activation", ["tanh", "logistic", "relu"])
def test_integrated_gradients_match_pytorch_autograd(task: str, index: int,
                                                     activation: str) -> None:
    # Reference library: PyTorch autograd on the same weights gives the path gradients;
    # the trapezoid rule and grouping are applied to them by hand.
    encoder, network, rows = setup(task, activation=activation, seed=13)
    X = encoder.encode(rows)
    x, baseline = X[2], X.mean(axis=0)
    steps = 32
    # The quadrature (trapezoid, or relu pieces) is the engine's; its gradients are torch's.
    nodes, rule = path_rule(network, baseline, x - baseline, steps)
    alphas = torch.from_numpy(np.array(nodes))[:, None]
    path = (torch.from_numpy(baseline) + alphas * torch.from_numpy(x - baseline))
    path.requires_grad_(True)
    act = {"tanh": torch.tanh, "logistic": torch.sigmoid, "relu": torch.relu}[activation]
    a = path
    for i, (w, b) in enumerate(zip(network.weights, network.biases, strict=True)):
        a = a @ torch.from_numpy(w) + torch.from_numpy(b)
        if i < len(network.weights) - 1:
            a = act(a)
    if task == "binary":
        p = torch.sigmoid(a[:, 0])
        out = p if index == 1 else 1 - p
    elif task == "multiclass":
        out = torch.softmax(a, dim=1)[:, index]
    else:
        out = a[:, 0] * encoder.target_scale + encoder.target_center
    (grads,) = torch.autograd.grad(out.sum(), path)
    g = grads.numpy()[: rule.size]
    if activation != "relu":
        # The trapezoid rule written out: (g_0 / 2 + g_1 + ... + g_{n-1} + g_n / 2) / n.
        assert np.allclose(rule, np.r_[0.5, np.ones(steps - 1), 0.5] / steps, rtol=1e-15)
    expected = encoder.group((rule @ g) * (x - baseline))
    result = explain(network, encoder, x, method="integrated_gradients", output_index=index,
                     baseline=baseline, steps=steps)
    np.testing.assert_allclose(list(result.attributions.values()), expected,
                               rtol=1e-10, atol=1e-13)
    ends = out.detach().numpy()
    assert result.value == pytest.approx(float(ends[-2]), rel=1e-12)  # alpha = 1
    assert result.baseline_value == pytest.approx(float(ends[-1]), rel=1e-12)  # alpha = 0
