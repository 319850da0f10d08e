"""Encoding: raw records to network columns, labels to targets, and state round trips."""

from __future__ import annotations

import io
import json

import numpy as np
import pytest

from engine.encoding import Encoder, RunningMoments
from engine.errors import InvalidInputError, SnapshotError
from engine.spec import apply_defaults

FEATURES = [
    {"name": "vibration_rms", "type": "numeric", "min": 0, "max": 100},
    {"name": "pump_family", "type": "categorical", "levels": ["centrifugal", "screw", "piston"]},
    {"name": "has_vfd", "type": "boolean"},
    {"name": "head_m", "type": "numeric"},
]


def make_spec(task: str = "binary", **overrides: object) -> dict[str, object]:
    spec: dict[str, object] = {"name": "m", "task": task, "target": "y", "features": FEATURES}
    if task == "multiclass":
        spec["classes"] = ["low", "mid", "high"]
    spec.update(overrides)
    return apply_defaults(spec)


def random_rows(n: int, seed: int = 0) -> list[dict[str, object]]:
    rng = np.random.default_rng(seed)
    families = ["centrifugal", "screw", "piston"]
    return [{"vibration_rms": float(rng.uniform(0, 100)),
             "pump_family": families[int(rng.integers(3))],
             "has_vfd": bool(rng.integers(2)),
             "head_m": float(rng.normal(40, 7))} for _ in range(n)]


# --------------------------------------------------------------------- Welford
def test_running_moments_equal_numpy_mean_and_population_variance() -> None:
    # Welford, Technometrics 4(3) (1962); reference library: numpy.mean / numpy.var.
    rng = np.random.default_rng(1)
    data = rng.normal(size=(500, 3)) * [1.0, 1e-3, 50.0] + [0.0, 1e4, -7.0]
    moments = RunningMoments(3)
    for row in data:
        moments.push(row)
    np.testing.assert_allclose(moments.mean, data.mean(axis=0), rtol=1e-14)
    np.testing.assert_allclose(moments.variance, data.var(axis=0), rtol=1e-8)
    assert moments.count == 500 and moments.distinct.all()


def test_running_moments_stay_stable_where_the_textbook_formula_cancels() -> None:
    # A large offset ruins E[x^2] - E[x]^2 but not Welford's recurrence (Welford 1962).
    rng = np.random.default_rng(2)
    data = 1e9 + rng.normal(size=(1000, 1))
    moments = RunningMoments(1)
    for row in data:
        moments.push(row)
    np.testing.assert_allclose(moments.variance, data.var(axis=0), rtol=1e-6)


def test_running_moments_notice_a_constant_column() -> None:
    moments = RunningMoments(2)
    for value in (3.0, 3.0, 3.0):
        moments.push(np.array([value, value + moments.count]))
    assert moments.distinct.tolist() == [False, True]


# ------------------------------------------------------------ numeric policy
def test_numeric_fields_are_standardised_from_the_warmup_rows() -> None:
    rows = random_rows(300)
    encoder = Encoder.from_spec(make_spec(), warmup=rows)
    raw = np.array([[r["vibration_rms"], r["head_m"]] for r in rows])
    numeric = np.flatnonzero(encoder.column_numeric)
    np.testing.assert_allclose(encoder.center[numeric], raw.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(encoder.scale[numeric], raw.std(axis=0), rtol=1e-10)
    encoded = encoder.encode(rows)[:, numeric]
    np.testing.assert_allclose(encoded.mean(axis=0), 0.0, atol=1e-12)
    np.testing.assert_allclose(encoded.std(axis=0), 1.0, rtol=1e-10)


def test_a_field_without_two_distinct_warmup_values_falls_back_to_bounds_then_unit() -> None:
    rows = [dict(r, vibration_rms=5.0, head_m=12.5) for r in random_rows(10)]
    encoder = Encoder.from_spec(make_spec(), warmup=rows)
    vibration, head = np.flatnonzero(encoder.column_numeric)
    # Declared bounds 0..100: centre 50, half-range 50.
    assert (encoder.center[vibration], encoder.scale[vibration]) == (50.0, 50.0)
    assert (encoder.center[head], encoder.scale[head]) == (0.0, 1.0)
    no_warmup = Encoder.from_spec(make_spec())
    assert (no_warmup.center[vibration], no_warmup.scale[vibration]) == (50.0, 50.0)
    assert (no_warmup.center[head], no_warmup.scale[head]) == (0.0, 1.0)


def test_statistics_are_frozen_once_made() -> None:
    encoder = Encoder.from_spec(make_spec(), warmup=random_rows(50))
    center, scale = encoder.center.copy(), encoder.scale.copy()
    first = encoder.encode(random_rows(5, seed=9))
    encoder.encode(random_rows(500, seed=10))
    np.testing.assert_array_equal(encoder.center, center)
    np.testing.assert_array_equal(encoder.scale, scale)
    np.testing.assert_array_equal(encoder.encode(random_rows(5, seed=9)), first)


# ----------------------------------------------------------- column layout
def test_columns_follow_declared_order_with_one_hot_levels_and_boolean_bits() -> None:
    encoder = Encoder.from_spec(make_spec())
    assert encoder.fields == ("vibration_rms", "pump_family", "has_vfd", "head_m")
    assert encoder.n_inputs == 6 and encoder.n_outputs == 1
    assert encoder.column_field.tolist() == [0, 1, 1, 1, 2, 3]
    assert encoder.column_numeric.tolist() == [True, False, False, False, False, True]
    row = {"vibration_rms": 75.0, "pump_family": "piston", "has_vfd": True, "head_m": 3}
    np.testing.assert_array_equal(encoder.encode([row])[0], [0.5, 0, 0, 1, 1, 3.0])
    row = dict(row, pump_family="centrifugal", has_vfd=False)
    np.testing.assert_array_equal(encoder.encode([row])[0], [0.5, 1, 0, 0, 0, 3.0])


def test_group_sums_each_fields_columns_over_leading_axes() -> None:
    encoder = Encoder.from_spec(make_spec())
    columns = np.arange(2 * 3 * 6, dtype=float).reshape(2, 3, 6)
    grouped = encoder.group(columns)
    assert grouped.shape == (2, 3, 4)
    expected = np.stack([columns[..., 0], columns[..., 1:4].sum(-1), columns[..., 4],
                         columns[..., 5]], axis=-1)
    np.testing.assert_array_equal(grouped, expected)


def test_raw_baseline_of_the_encoded_mean_gives_raw_means_and_shares() -> None:
    rows = random_rows(40)
    encoder = Encoder.from_spec(make_spec(), warmup=rows[:20])
    baseline = encoder.raw_baseline(encoder.encode(rows).mean(axis=0))
    assert baseline["vibration_rms"] == pytest.approx(np.mean([r["vibration_rms"] for r in rows]))
    assert baseline["head_m"] == pytest.approx(np.mean([r["head_m"] for r in rows]))
    assert baseline["has_vfd"] == pytest.approx(np.mean([r["has_vfd"] for r in rows]))
    shares = {level: np.mean([r["pump_family"] == level for r in rows])
              for level in ("centrifugal", "screw", "piston")}
    assert baseline["pump_family"] == pytest.approx(shares)
    json.dumps(baseline)


# ------------------------------------------------------------- bad input
GOOD = {"vibration_rms": 4.1, "pump_family": "screw", "has_vfd": True, "head_m": 30}


@pytest.mark.parametrize(("change", "field"), [
    ({"vibration_rms": None}, "vibration_rms"),
    ({"vibration_rms": "4.1"}, "vibration_rms"),
    ({"vibration_rms": True}, "vibration_rms"),          # JSON true is not a number
    ({"vibration_rms": float("nan")}, "vibration_rms"),
    ({"vibration_rms": float("inf")}, "vibration_rms"),
    ({"head_m": 10**400}, "head_m"),                     # overflows float64
    ({"has_vfd": 1}, "has_vfd"),                         # 1 == True but is not a boolean
    ({"has_vfd": "true"}, "has_vfd"),
    ({"pump_family": "turbine"}, "pump_family"),
    ({"pump_family": ["screw"]}, "pump_family"),
    ({"pump_family": 1}, "pump_family"),
    ({"flow_lps": 3.0}, "flow_lps"),                     # unknown field
])
def test_bad_values_raise_invalid_input_naming_the_field(change: dict[str, object],
                                                         field: str) -> None:
    encoder = Encoder.from_spec(make_spec())
    with pytest.raises(InvalidInputError) as caught:
        encoder.encode([GOOD, {**GOOD, **change}])
    assert caught.value.field == field
    assert "row 1" in str(caught.value)


def test_a_missing_field_or_a_non_mapping_row_is_rejected() -> None:
    encoder = Encoder.from_spec(make_spec())
    partial = {k: v for k, v in GOOD.items() if k != "has_vfd"}
    with pytest.raises(InvalidInputError) as caught:
        encoder.encode([partial])
    assert caught.value.field == "has_vfd"
    with pytest.raises(InvalidInputError):
        encoder.encode([[4.1, "screw", True, 30]])  # type: ignore[list-item]


def test_numpy_scalars_are_accepted_as_numbers_and_booleans() -> None:
    encoder = Encoder.from_spec(make_spec())
    row = {**GOOD, "vibration_rms": np.float32(4.0), "head_m": np.int64(30),
           "has_vfd": np.bool_(True)}
    plain = {**GOOD, "vibration_rms": 4.0}
    np.testing.assert_array_equal(encoder.encode([row]), encoder.encode([plain]))


def test_invalid_warmup_rows_are_rejected_too() -> None:
    with pytest.raises(InvalidInputError):
        Encoder.from_spec(make_spec(), warmup=[{**GOOD, "head_m": float("nan")}])


# ----------------------------------------------------------------- labels
def test_binary_default_classes_are_booleans_matched_by_type() -> None:
    encoder = Encoder.from_spec(make_spec())
    assert encoder.classes == [False, True]
    assert encoder.encode_labels([True, False, True]).tolist() == [1, 0, 1]
    assert encoder.encode_labels([True]).dtype == np.int64
    for wrong in (1, 0, "true", None, 1.0):
        with pytest.raises(InvalidInputError) as caught:
            encoder.encode_labels([True, wrong])
        assert caught.value.field == "label"
    assert encoder.label_of(1) is True


def test_string_and_multiclass_labels_map_to_declared_order() -> None:
    binary = Encoder.from_spec(make_spec(classes=["ok", "failed"]))
    assert binary.encode_labels(["failed", "ok"]).tolist() == [1, 0]
    multi = Encoder.from_spec(make_spec("multiclass"))
    assert multi.n_outputs == 3
    assert multi.encode_labels(["high", "low", "mid"]).tolist() == [2, 0, 1]
    assert multi.label_of(2) == "high"
    with pytest.raises(InvalidInputError):
        multi.encode_labels(["urgent"])
    with pytest.raises(InvalidInputError):
        multi.encode_labels([["low"]])  # unhashable


def test_integer_classes_do_not_accept_booleans() -> None:
    encoder = Encoder.from_spec(make_spec(classes=[0, 1]))
    assert encoder.encode_labels([1, 0]).tolist() == [1, 0]
    with pytest.raises(InvalidInputError):
        encoder.encode_labels([True])


def test_regression_targets_are_standardised_from_warmup_labels_and_decoded_back() -> None:
    rng = np.random.default_rng(3)
    labels = (rng.normal(size=200) * 12.0 + 80.0).tolist()
    encoder = Encoder.from_spec(make_spec("regression"), warmup=random_rows(200),
                                warmup_labels=labels)
    assert encoder.n_outputs == 1 and encoder.classes == []
    # Reference library: numpy.mean / numpy.std (population), as for the inputs.
    assert encoder.target_center == pytest.approx(np.mean(labels), rel=1e-12)
    assert encoder.target_scale == pytest.approx(np.std(labels), rel=1e-10)
    targets = encoder.encode_labels(labels)
    assert targets.dtype == np.float64
    np.testing.assert_allclose(encoder.decode_values(targets), labels, rtol=1e-12)
    for wrong in (True, "3", float("nan"), None):
        with pytest.raises(InvalidInputError):
            encoder.encode_labels([wrong])


def test_classification_target_scale_is_one() -> None:
    assert Encoder.from_spec(make_spec()).target_scale == 1.0


# ------------------------------------------------------------------ state
def test_state_round_trips_through_npz_and_json_bit_exactly() -> None:
    spec = make_spec("regression")
    encoder = Encoder.from_spec(spec, warmup=random_rows(64), warmup_labels=list(range(64)))
    buffer = io.BytesIO()
    np.savez(buffer, **encoder.arrays())
    buffer.seek(0)
    with np.load(buffer, allow_pickle=False) as loaded:
        arrays = {key: loaded[key] for key in loaded.files}
    meta = json.loads(json.dumps(encoder.meta()))
    restored = Encoder.from_state(spec, arrays, meta)
    rows = random_rows(20, seed=4)
    np.testing.assert_array_equal(restored.encode(rows), encoder.encode(rows))
    assert (restored.target_center, restored.target_scale) == (
        encoder.target_center, encoder.target_scale)


def test_state_that_does_not_fit_the_spec_is_a_snapshot_error() -> None:
    encoder = Encoder.from_spec(make_spec(), warmup=random_rows(30))
    arrays, meta = encoder.arrays(), encoder.meta()
    other = make_spec(features=FEATURES[:2])
    with pytest.raises(SnapshotError):
        Encoder.from_state(other, arrays, meta)
    with pytest.raises(SnapshotError):
        Encoder.from_state(make_spec(), {**arrays, "scale": -arrays["scale"]}, meta)
    with pytest.raises(SnapshotError):
        Encoder.from_state(make_spec(), {"center": arrays["center"]}, meta)
    with pytest.raises(SnapshotError):
        Encoder.from_state(make_spec(), arrays, {**meta, "version": 99})
