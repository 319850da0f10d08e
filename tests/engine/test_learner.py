"""The Learner facade: create, learn (test-then-train), predict, evaluate, fit, explain."""

from __future__ import annotations

import numpy as np
import pytest

from engine import (
    InvalidInputError,
    Learner,
    NonFiniteError,
    TrainingCancelled,
    batch_metrics,
)


def spec(task: str = "binary", **overrides):
    base = {
        "name": "pump-risk", "task": task, "target": "t",
        "features": [{"name": "flow", "type": "numeric", "min": 0, "max": 50},
                     {"name": "family", "type": "categorical",
                      "levels": ["centrifugal", "screw", "piston"]},
                     {"name": "vfd", "type": "boolean"}],
        "hidden_layers": [8, 4],
        "training": {"learning_rate": 0.05},
    }
    if task == "multiclass":
        base["classes"] = ["low", "mid", "high"]
    if task == "binary":
        base["classes"] = ["ok", "failed"]
    base.update(overrides)
    return base


def rows_and_labels(task: str, n: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    rows, labels = [], []
    for _ in range(n):
        row = {"flow": float(rng.uniform(0, 50)),
               "family": str(rng.choice(["centrifugal", "screw", "piston"])),
               "vfd": bool(rng.integers(0, 2))}
        score = (row["flow"] - 25) / 10 + (1.0 if row["vfd"] else -1.0)
        rows.append(row)
        if task == "binary":
            labels.append("failed" if score > 0 else "ok")
        elif task == "multiclass":
            labels.append("low" if score < -1 else "mid" if score < 1 else "high")
        else:
            labels.append(3.0 * score + 100.0)
    return rows, labels


@pytest.mark.parametrize("task", ["binary", "multiclass", "regression"])
def test_learner_learns_online_and_reports_prequential_metrics(task):
    rows, labels = rows_and_labels(task, 600)
    learner = Learner.create(spec(task), warmup=rows[:100], warmup_labels=labels[:100])
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    scores = learner.learn(X, Y)
    assert scores.shape == (600, learner.network.n_outputs)
    assert learner.records_seen == 600
    metrics = learner.prequential_metrics()
    assert metrics["n"] == 600
    # Prequential metrics are the metrics of the pre-step scores (Dawid 1984).
    y_raw = np.array(labels, dtype=float) if task == "regression" else Y
    expected = batch_metrics(task, y_raw, scores)
    for name in ("accuracy", "log_loss", "rmse", "mae"):
        if name in expected:
            assert metrics[name] == pytest.approx(expected[name], rel=1e-9)
    held_out = learner.evaluate(X[-200:], Y[-200:])
    if task == "regression":
        assert held_out["r2"] > 0.8
    else:
        assert held_out["accuracy"] > 0.85
    predicted = learner.predict(X[:5])
    if task == "regression":
        assert predicted.shape == (5, 1)
    else:
        assert predicted.shape == (5, len(learner.classes))
        np.testing.assert_allclose(predicted.sum(axis=1), 1.0)


def test_scores_are_taken_before_each_step():
    rows, labels = rows_and_labels("binary", 3)
    learner = Learner.create(spec(), warmup=rows)
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    before = learner.predict(X[:1])[0, 1]
    scores = learner.learn(X, Y)
    after = learner.predict(X[:1])[0, 1]
    # One row through the batch path and through the per-record kernel: BLAS
    # may sum the products in another order (matrix-matrix against
    # matrix-vector, chosen per CPU), so they agree to rounding, not to the bit.
    # The step itself moves the score by far more than that.
    np.testing.assert_allclose(scores[0, 0], before, rtol=1e-13, atol=0)
    assert abs(after - before) > 1e-6


def test_input_mean_does_not_depend_on_how_the_stream_is_cut():
    rows, labels = rows_and_labels("binary", 50)
    a = Learner.create(spec(), warmup=rows)
    b = Learner.create(spec(), warmup=rows)
    X, Y = a.encode(rows), a.encode_labels(labels)
    a.learn(X, Y)
    for start, stop in [(0, 7), (7, 8), (8, 31), (31, 50)]:
        b.learn(X[start:stop], Y[start:stop])
    assert np.array_equal(a.input_mean, b.input_mean)
    assert np.array_equal(a.network.params, b.network.params)
    np.testing.assert_allclose(a.input_mean, X.mean(axis=0), rtol=1e-12, atol=1e-15)


def test_bad_input_raises_and_changes_nothing():
    rows, labels = rows_and_labels("binary", 10)
    learner = Learner.create(spec(), warmup=rows)
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    params = learner.network.params.copy()
    bad = X.copy()
    bad[3, 0] = np.nan
    with pytest.raises(InvalidInputError):
        learner.learn(bad, Y)
    with pytest.raises(InvalidInputError):
        learner.learn(X, np.full(10, 2))
    with pytest.raises(InvalidInputError):
        learner.learn(X[:, :-1], Y)
    assert np.array_equal(params, learner.network.params) and learner.records_seen == 0


def test_a_non_finite_step_raises_with_applied_and_keeps_the_state_before_that_row():
    rows, labels = rows_and_labels("regression", 20)
    learner = Learner.create(spec("regression", training={"clip_norm": None}),
                             warmup=rows, warmup_labels=labels)
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    learner.learn(X[:5], Y[:5])
    Y_bad = Y[5:].copy()
    Y_bad[3] = 1e300  # the squared error of this row overflows
    reference = Learner.from_bytes(learner.to_bytes())
    reference.learn(X[5:8], Y[5:8])
    with pytest.raises(NonFiniteError) as caught:
        learner.learn(X[5:], Y_bad)
    assert caught.value.applied == 3
    assert learner.records_seen == 8
    assert np.array_equal(learner.network.params, reference.network.params)
    assert learner.prequential_metrics() == reference.prequential_metrics()
    assert np.array_equal(learner.input_mean, reference.input_mean)


def test_fit_trains_in_batch_and_reports_progress():
    rows, labels = rows_and_labels("binary", 400)
    learner = Learner.create(spec(training={"max_epochs": 30, "learning_rate": 0.05}),
                             warmup=rows)
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    seen = []
    report = learner.fit(X, Y, progress=lambda e, loss, v: seen.append((e, loss, v)))
    assert [s[0] for s in seen] == list(range(1, report.epochs + 1))
    assert report.n_validation == 40 and report.n_train == 360
    assert learner.evaluate(X, Y)["accuracy"] > 0.9
    assert learner.records_seen == 0


def test_fit_cancel_raises_and_leaves_the_learner_unchanged():
    rows, labels = rows_and_labels("binary", 100)
    learner = Learner.create(spec(), warmup=rows)
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    params = learner.network.params.copy()
    calls = []

    def cancel():
        calls.append(1)
        return len(calls) > 2

    with pytest.raises(TrainingCancelled):
        learner.fit(X, Y, cancel=cancel)
    assert np.array_equal(params, learner.network.params)


def test_explain_uses_labels_and_the_input_mean_baseline():
    rows, labels = rows_and_labels("binary", 300)
    learner = Learner.create(spec(), warmup=rows)
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    learner.learn(X, Y)
    explanation = learner.explain(X[0], output="failed")
    assert explanation.output == "failed"
    assert set(explanation.attributions) == {"flow", "family", "vfd"}
    # Integrated gradients are complete (Sundararajan, Taly & Yan 2017).
    assert explanation.completeness_gap < 1e-3 * abs(
        explanation.value - explanation.baseline_value) + 1e-9
    assert explanation.baseline["flow"] == pytest.approx(np.mean([r["flow"] for r in rows]))
    assert learner.explain(rows[0], output="failed").attributions == explanation.attributions
    with pytest.raises(InvalidInputError) as caught:
        learner.explain(X[0], output="broken")
    assert caught.value.field == "output"


def test_the_default_baseline_follows_the_records_and_each_explanation_owns_its_copy():
    """The raw input mean is kept between explanations: it must follow learn() and
    fit(), and an explanation's baseline dict must be its own."""
    rows, labels = rows_and_labels("binary", 300)
    learner = Learner.create(spec(), warmup=rows)
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    learner.learn(X[:100], Y[:100])
    first = learner.explain(X[0], method="gradient", output="failed")
    assert first.baseline == learner.encoder.raw_baseline(learner.input_mean)
    first.baseline["flow"] = -1.0
    first.baseline["family"]["screw"] = -1.0
    again = learner.explain(X[0], method="gradient", output="failed")
    assert again.baseline == learner.encoder.raw_baseline(learner.input_mean)
    learner.learn(X[100:], Y[100:])
    moved = learner.explain(X[0], method="gradient", output="failed")
    assert moved.baseline == learner.encoder.raw_baseline(learner.input_mean)
    assert moved.baseline["flow"] != again.baseline["flow"]
    learner.fit(X[:50], Y[:50])
    refit = learner.explain(X[0], method="gradient", output="failed")
    assert refit.baseline == learner.encoder.raw_baseline(learner.input_mean)
    assert refit.baseline["flow"] == pytest.approx(np.mean([r["flow"] for r in rows[:50]]))


def test_explain_output_labels_are_exact_before_and_after_a_valid_one():
    rows, labels = rows_and_labels("binary", 50)
    learner = Learner.create(spec(classes=[False, True]), warmup=rows)
    for bad in (1, 1.0, "True", ["x"], None.__class__):
        with pytest.raises(InvalidInputError) as caught:
            learner.explain(learner.encode(rows[:1])[0], method="gradient", output=bad)
        assert caught.value.field == "output"
    x = learner.encode(rows[:1])[0]
    assert learner.explain(x, method="gradient", output=True).output is True
    assert learner.explain(x, method="gradient", output=False).output is False
    with pytest.raises(InvalidInputError):
        learner.explain(x, method="gradient", output=1)


def test_a_fit_that_turns_non_finite_raises_and_leaves_the_learner_unchanged():
    rows, labels = rows_and_labels("regression", 60)
    learner = Learner.create(
        spec("regression", training={"learning_rate": 1e6, "clip_norm": None, "momentum": 0.0,
                                     "max_epochs": 50}),
        warmup=rows, warmup_labels=labels)
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    params = learner.network.params.copy()
    with pytest.raises(NonFiniteError):
        learner.fit(X, Y * 1e100)
    assert np.array_equal(params, learner.network.params)
    assert learner.input_count == 0


def test_learner_refuses_an_invalid_spec_naming_the_field():
    with pytest.raises(InvalidInputError) as caught:
        Learner.create(spec(hidden_layers=[0]))
    assert caught.value.field == "hidden_layers"


def test_a_non_finite_input_mean_is_refused_as_a_baseline():
    """The kept default baseline is checked once per mean, still checked."""
    rows, labels = rows_and_labels("binary", 20)
    learner = Learner.create(spec(), warmup=rows)
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    learner.learn(X[:10], Y[:10])
    learner.explain(X[0], method="gradient")  # keeps the finite mean's raw form
    learner.input_sum = np.full(learner.encoder.n_inputs, np.inf)
    learner.learn(X[10:11], Y[10:11])  # a new mean: inf
    with pytest.raises(InvalidInputError) as caught:
        learner.explain(X[0], method="gradient")
    assert caught.value.field == "baseline"
