"""Metrics: batch and prequential forms agree, state round trips, the hot path allocates nothing."""

from __future__ import annotations

import io
import json
import math
import tracemalloc

import numpy as np
import pytest

from engine.errors import InvalidInputError, SnapshotError
from engine.metrics import AUC_BINS, Prequential, batch_metrics


def binary_data(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    y = rng.integers(0, 2, n)
    scores = 1.0 / (1.0 + np.exp(-(rng.normal(size=n) + 1.2 * (2 * y - 1))))
    return y, scores[:, None]


def multiclass_data(n: int, k: int = 4, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    y = rng.integers(0, k, n)
    logits = rng.normal(size=(n, k))
    logits[np.arange(n), y] += 1.0
    p = np.exp(logits)
    return y, p / p.sum(axis=1, keepdims=True)


def regression_data(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    y = rng.normal(50.0, 10.0, n)
    return y, (y + rng.normal(0.0, 4.0, n))[:, None]


DATA = {"binary": binary_data, "multiclass": multiclass_data, "regression": regression_data}


def run_prequential(task: str, y: np.ndarray, scores: np.ndarray) -> Prequential:
    metrics = Prequential(task, scores.shape[1] if task == "multiclass" else 2)
    for label, row in zip(y, scores, strict=True):
        metrics.update(label, row)
    return metrics


@pytest.mark.parametrize("task", ["binary", "multiclass", "regression"])
def test_prequential_equals_batch_metrics_of_the_same_scores(task: str) -> None:
    # Prequential evaluation is the metric of the scores taken before each update
    # (Dawid 1984; Gama, Sebastiao & Rodrigues 2013).
    y, scores = DATA[task](700)
    streamed = run_prequential(task, y, scores).result()
    batch = batch_metrics(task, y, scores)
    assert streamed.keys() == batch.keys()
    for name, value in batch.items():
        if name == "roc_auc":
            continue  # the streaming AUC is binned: see the next test
        assert streamed[name] == pytest.approx(value, rel=1e-12, abs=1e-12), name


def test_streaming_auc_stays_within_its_documented_bin_bound() -> None:
    y, scores = binary_data(2000, seed=3)
    exact = batch_metrics("binary", y, scores)["roc_auc"]
    metrics = run_prequential("binary", y, scores)
    histogram = metrics.arrays()["histogram"].astype(float)
    # Documented bound: half the share of positive-negative pairs in one bin.
    bound = 0.5 * float(histogram[0] @ histogram[1]) / (histogram[0].sum() * histogram[1].sum())
    assert abs(metrics.result()["roc_auc"] - exact) <= bound + 1e-15
    assert bound < 1e-2


def test_metrics_of_nothing_are_just_a_zero_count() -> None:
    for task in ("binary", "multiclass", "regression"):
        assert Prequential(task, 3).result() == {"n": 0.0}
    assert batch_metrics("binary", np.zeros(0, int), np.zeros((0, 1))) == {"n": 0.0}
    assert batch_metrics("regression", np.zeros(0), np.zeros((0, 1))) == {"n": 0.0}


def test_undefined_metrics_are_left_out_not_nan() -> None:
    one_class = batch_metrics("binary", np.ones(5, int), np.full((5, 1), 0.7))
    assert "roc_auc" not in one_class and one_class["accuracy"] == 1.0
    streamed = run_prequential("binary", np.ones(5, int), np.full((5, 1), 0.7)).result()
    assert "roc_auc" not in streamed
    single = batch_metrics("regression", np.array([3.0]), np.array([[2.0]]))
    assert "r2" not in single and single["mae"] == 1.0
    json.dumps(one_class, allow_nan=False)


def test_log_loss_is_finite_at_probabilities_zero_and_one() -> None:
    y = np.array([1, 0, 1, 0])
    scores = np.array([[0.0], [1.0], [1.0], [0.0]])
    batch = batch_metrics("binary", y, scores)
    streamed = run_prequential("binary", y, scores).result()
    assert math.isfinite(batch["log_loss"]) and batch["log_loss"] > 10
    assert streamed["log_loss"] == pytest.approx(batch["log_loss"], rel=1e-12)


def test_a_probability_of_one_half_predicts_class_zero_as_argmax_does() -> None:
    result = batch_metrics("binary", np.array([0, 1]), np.array([[0.5], [0.5]]))
    assert result["accuracy"] == 0.5
    assert run_prequential("binary", np.array([0, 1]), np.array([[0.5], [0.5]])).result()[
        "accuracy"] == 0.5


def test_bad_shapes_and_labels_are_invalid_input() -> None:
    with pytest.raises(InvalidInputError):
        batch_metrics("binary", np.zeros(3, int), np.zeros((4, 1)))
    with pytest.raises(InvalidInputError):
        batch_metrics("multiclass", np.array([0, 5]), np.full((2, 3), 1 / 3))
    with pytest.raises(InvalidInputError):
        batch_metrics("ranking", np.zeros(1), np.zeros((1, 1)))
    metrics = Prequential("multiclass", 3)
    with pytest.raises(InvalidInputError):
        metrics.update(-1, np.full(3, 1 / 3))
    assert metrics.n == 0


@pytest.mark.parametrize("task", ["binary", "multiclass", "regression"])
def test_state_round_trip_resumes_exactly(task: str) -> None:
    y, scores = DATA[task](400, seed=5)
    whole = run_prequential(task, y, scores)
    first = run_prequential(task, y[:150], scores[:150])
    buffer = io.BytesIO()
    np.savez(buffer, **first.arrays())
    buffer.seek(0)
    with np.load(buffer, allow_pickle=False) as loaded:
        arrays = {key: loaded[key] for key in loaded.files}
    resumed = Prequential.from_state(arrays, json.loads(json.dumps(first.meta())))
    for label, row in zip(y[150:], scores[150:], strict=True):
        resumed.update(label, row)
    assert resumed.result() == whole.result()  # bit-exact: same sums in the same order


def test_corrupt_state_is_a_snapshot_error() -> None:
    metrics = run_prequential("binary", *binary_data(50))
    arrays, meta = metrics.arrays(), metrics.meta()
    broken = [
        ({**arrays, "confusion": arrays["confusion"][:1]}, meta),
        ({**arrays, "histogram": arrays["histogram"][:, :10]}, meta),
        ({key: v for key, v in arrays.items() if key != "sums"}, meta),
        ({**arrays, "sums": np.full(5, np.nan)}, meta),
        (arrays, {**meta, "version": 2}),
        (arrays, {**meta, "task": "ranking"}),
        (arrays, {**meta, "auc_bins": AUC_BINS // 2}),
    ]
    for bad_arrays, bad_meta in broken:
        with pytest.raises(SnapshotError):
            Prequential.from_state(bad_arrays, bad_meta)


@pytest.mark.parametrize("task", ["binary", "multiclass", "regression"])
def test_update_allocates_nothing_per_record(task: str) -> None:
    y, scores = DATA[task](3000, seed=7)
    metrics = Prequential(task, scores.shape[1] if task == "multiclass" else 2)
    labels = y.tolist()
    rows = list(scores)
    for label, row in zip(labels[:100], rows[:100], strict=True):
        metrics.update(label, row)  # warm up interpreter caches
    pairs = list(zip(labels[100:], rows[100:], strict=True))
    tracemalloc.start()
    before = tracemalloc.take_snapshot()
    start, _ = tracemalloc.get_traced_memory()
    tracemalloc.reset_peak()
    for label, row in pairs:
        metrics.update(label, row)
    _, peak = tracemalloc.get_traced_memory()
    after = tracemalloc.take_snapshot()
    tracemalloc.stop()
    grown = sum(stat.size_diff for stat in after.compare_to(before, "filename")
                if stat.traceback[0].filename.endswith("engine/metrics.py"))
    assert grown <= 512, f"update() kept {grown} bytes over 2900 records"
    assert peak - start <= 2048, f"update() held {peak - start} bytes at once"


@pytest.mark.parametrize("task", ["binary", "regression"])
def test_scalar_update_folds_exactly_what_update_folds(task: str) -> None:
    """The online trainer's float form of update() leaves bit-identical state."""
    y, scores = DATA[task](500, seed=3)
    by_row, by_float = Prequential(task, 2), Prequential(task, 2)
    record = by_float.scalar_update()
    for label, row in zip(y.tolist(), scores, strict=True):
        by_row.update(label, row)
        record(label, float(row[0]))
    assert by_float.result() == by_row.result()
    for name, array in by_row.arrays().items():
        assert np.array_equal(by_float.arrays()[name], array), name


def test_scalar_update_refuses_a_label_outside_the_classes_and_counts_nothing() -> None:
    metrics = Prequential("binary", 2)
    with pytest.raises(InvalidInputError):
        metrics.scalar_update()(2, 0.7)
    assert metrics.n == 0
    with pytest.raises(InvalidInputError):
        Prequential("multiclass", 3).scalar_update()


def test_the_written_out_bin_of_the_float_update_matches_bin() -> None:
    """_update_binary computes _bin inline; the histogram must land in the same bins,
    at the clamps and the bin edges too."""
    edges = [(b / 128.0 - 16.0) for b in (0, 1, 2047, 2048, 4095)]
    probabilities = [0.0, 1.0, 1e-300, 1.0 - 1e-16, 0.5, 1e-9, 1.0 - 1e-9]
    probabilities += [1.0 / (1.0 + math.exp(-t)) for t in edges]
    probabilities += np.random.default_rng(5).uniform(0.0, 1.0, 500).tolist()
    metrics = Prequential("binary", 2)
    for p in probabilities:
        metrics.scalar_update()(1, p)
    expected = [0] * AUC_BINS
    for p in probabilities:
        expected[Prequential._bin(p)] += 1
    assert metrics.arrays()["histogram"][1].tolist() == expected
