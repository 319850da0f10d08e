"""Attribution: the fused backward passes agree with the network's, outputs and
units are the documented ones, and bad requests are refused."""

from __future__ import annotations

import json

import numpy as np
import pytest

from engine.attribution import METHODS, explain
from engine.encoding import Encoder
from engine.errors import InvalidInputError
from engine.network import Network
from engine.spec import apply_defaults

HEAD = {"binary": "logistic", "multiclass": "softmax", "regression": "identity"}
FEATURES = [
    {"name": "vibration_rms", "type": "numeric", "min": 0, "max": 100},
    {"name": "pump_family", "type": "categorical", "levels": ["centrifugal", "screw", "piston"]},
    {"name": "has_vfd", "type": "boolean"},
    {"name": "head_m", "type": "numeric"},
]


def random_rows(n: int, seed: int) -> list[dict[str, object]]:
    rng = np.random.default_rng(seed)
    families = ["centrifugal", "screw", "piston"]
    return [{"vibration_rms": float(rng.uniform(0, 100)),
             "pump_family": families[int(rng.integers(3))],
             "has_vfd": bool(rng.integers(2)),
             "head_m": float(rng.normal(40, 7))} for _ in range(n)]


def setup(task: str, hidden: tuple[int, ...] = (8, 5), activation: str = "tanh",
          seed: int = 0) -> tuple[Encoder, Network, np.ndarray]:
    spec = {"name": "m", "task": task, "target": "y", "features": FEATURES}
    if task == "multiclass":
        spec["classes"] = ["low", "mid", "high"]
    rows = random_rows(64, seed)
    labels = np.random.default_rng(seed).normal(80, 12, 64).tolist()
    encoder = Encoder.from_spec(apply_defaults(spec), warmup=rows,
                                warmup_labels=labels if task == "regression" else ())
    network = Network.create((encoder.n_inputs, *hidden, encoder.n_outputs), activation,
                             HEAD[task], np.random.default_rng(seed + 1))
    network.params[:] = np.random.default_rng(seed + 2).normal(0.0, 0.8, network.params.size)
    return encoder, network, encoder.encode(rows)


def test_gradient_is_per_raw_unit_and_first_order_change_for_one_hot_fields() -> None:
    encoder, network, X = setup("binary")
    x, baseline = X[3], X.mean(axis=0)
    result = explain(network, encoder, x, method="gradient", output_index=1, baseline=baseline)
    encoded = network.input_gradient(x, 0)[0]
    assert result.attributions["vibration_rms"] == pytest.approx(encoded[0] / encoder.scale[0])
    assert result.attributions["head_m"] == pytest.approx(encoded[5] / encoder.scale[5])
    delta = x - baseline
    assert result.attributions["pump_family"] == pytest.approx(encoded[1:4] @ delta[1:4])
    assert result.attributions["has_vfd"] == pytest.approx(encoded[4] * delta[4])
    assert result.completeness_gap is None


def test_binary_class_zero_is_the_mirror_of_class_one() -> None:
    encoder, network, X = setup("binary")
    x, baseline = X[0], X.mean(axis=0)
    for method in METHODS:
        one = explain(network, encoder, x, method=method, output_index=1, baseline=baseline)
        zero = explain(network, encoder, x, method=method, output_index=0, baseline=baseline)
        assert one.output is True and zero.output is False
        assert zero.value == pytest.approx(1.0 - one.value)
        assert zero.baseline_value == pytest.approx(1.0 - one.baseline_value)
        for field in encoder.fields:
            assert zero.attributions[field] == pytest.approx(-one.attributions[field])
    assert one.value == pytest.approx(float(network.forward(x)[0, 0]))


def test_regression_answers_in_raw_target_units() -> None:
    encoder, network, X = setup("regression")
    x, baseline = X[1], X.mean(axis=0)
    result = explain(network, encoder, x, method="gradient_times_input", output_index=0,
                     baseline=baseline)
    assert result.output is None
    raw = encoder.decode_values(network.forward(np.stack([x, baseline]))[:, 0])
    assert (result.value, result.baseline_value) == pytest.approx(tuple(raw))
    grouped = encoder.group(network.input_gradient(x, 0)[0] * (x - baseline))
    expected = grouped * encoder.target_scale
    assert list(result.attributions.values()) == pytest.approx(expected.tolist())


def test_multiclass_explains_the_chosen_class_probability() -> None:
    encoder, network, X = setup("multiclass")
    x, baseline = X[2], X.mean(axis=0)
    for index, label in enumerate(encoder.classes):
        result = explain(network, encoder, x, method="integrated_gradients", output_index=index,
                         baseline=baseline)
        assert result.output == label
        assert result.value == pytest.approx(float(network.forward(x)[0, index]))
        change = result.value - result.baseline_value
        gap = abs(sum(result.attributions.values()) - change)
        assert result.completeness_gap == pytest.approx(gap, abs=1e-15)
        assert gap < 1e-3 * abs(change)


@pytest.mark.parametrize("task", ["binary", "multiclass", "regression"])
@pytest.mark.parametrize("method", METHODS)
def test_no_output_index_explains_the_predicted_class(task: str, method: str) -> None:
    encoder, network, X = setup(task, seed=2)
    baseline = X.mean(axis=0)
    out = network.forward(X[:12])
    if task == "binary":
        predicted = (out[:, 0] > 0.5).astype(int)  # argmax of [1 - p, p]
        assert len(set(predicted.tolist())) == 2  # both classes get explained
    else:
        predicted = out.argmax(axis=1) if task == "multiclass" else np.zeros(12, int)
    for x, index in zip(X[:12], predicted.tolist(), strict=True):
        chosen = explain(network, encoder, x, method=method, output_index=None,
                         baseline=baseline)
        explicit = explain(network, encoder, x, method=method, output_index=index,
                           baseline=baseline)
        assert chosen == explicit


def test_smoothgrad_is_seeded() -> None:
    encoder, network, X = setup("binary")
    kwargs = {"method": "smoothgrad", "output_index": 1, "baseline": X.mean(axis=0)}
    first = explain(network, encoder, X[0], seed=4, **kwargs)
    assert explain(network, encoder, X[0], seed=4, **kwargs) == first
    assert explain(network, encoder, X[0], seed=5, **kwargs) != first


def test_explanation_is_json_ready_with_a_raw_baseline() -> None:
    encoder, network, X = setup("binary")
    baseline = X.mean(axis=0)
    result = explain(network, encoder, X[0], method="integrated_gradients", output_index=1,
                     baseline=baseline)
    body = json.loads(json.dumps(result.as_dict(), allow_nan=False))
    assert body["method"] == "integrated_gradients" and body["output"] is True
    assert list(body["attributions"]) == list(encoder.fields)
    assert body["baseline"] == encoder.raw_baseline(baseline)
    assert set(body["baseline"]["pump_family"]) == {"centrifugal", "screw", "piston"}
    assert body["completeness_gap"] >= 0.0


@pytest.mark.parametrize(("change", "field"), [
    ({"method": "saliency"}, "explain"),
    ({"output_index": 2}, "output"),
    ({"output_index": -1}, "output"),
    ({"output_index": True}, "output"),
    ({"x": np.zeros(5)}, "x"),
    ({"x": np.full(6, np.nan)}, "x"),
    ({"baseline": np.full(6, np.inf)}, "baseline"),
    ({"steps": 0}, "steps"),
    ({"steps": 2.5}, "steps"),
    ({"method": "smoothgrad", "samples": 0}, "samples"),
    ({"method": "smoothgrad", "noise": -1.0}, "noise"),
    ({"method": "smoothgrad", "noise": float("nan")}, "noise"),
])
def test_bad_requests_raise_invalid_input(change: dict[str, object], field: str) -> None:
    encoder, network, X = setup("binary")
    kwargs: dict[str, object] = {"x": X[0], "method": "integrated_gradients",
                                 "output_index": 1, "baseline": X.mean(axis=0), **change}
    with pytest.raises(InvalidInputError) as caught:
        explain(network, encoder, **kwargs)  # type: ignore[arg-type]
    assert caught.value.field == field


def test_a_network_that_does_not_fit_the_encoder_is_refused() -> None:
    encoder, _, X = setup("binary")
    other = Network.create((5, 4, 1), "tanh", "logistic", np.random.default_rng(0))
    with pytest.raises(InvalidInputError):
        explain(other, encoder, X[0], method="gradient", output_index=1, baseline=X[1])
