"""Track-record sums and the Page-Hinkley alarm (engine.track_record)."""

from __future__ import annotations

import numpy as np
import pytest

from engine.errors import InvalidInputError
from engine.track_record import (
    AlarmState,
    Tally,
    case_losses,
    page_hinkley,
    relative_errors,
)


def binary_cases(seed: int, n: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    p = rng.uniform(0.0, 1.0, n)
    return (rng.uniform(size=n) < p).astype(np.int64), p[:, None]


@pytest.mark.parametrize("task", ["binary", "multiclass", "regression"])
def test_tallies_merged_day_by_day_equal_the_tally_of_all_cases(task: str) -> None:
    rng = np.random.default_rng(3)
    n = 900
    if task == "binary":
        y, scores = binary_cases(3, n)
    elif task == "multiclass":
        scores = rng.dirichlet(np.ones(3), n)
        y = rng.integers(0, 3, n)
    else:
        y = rng.normal(50.0, 4.0, n)
        scores = (y + rng.normal(0.0, 1.0, n))[:, None]
    whole = Tally.of(task, y, scores)
    merged = Tally(task)
    for part in np.array_split(np.arange(n), 7):
        merged = merged.merged(Tally.of(task, y[part], scores[part]))
    assert merged.metrics().keys() == whole.metrics().keys()
    for name, value in whole.metrics().items():
        assert merged.metrics()[name] == pytest.approx(value, rel=1e-12)
    assert np.allclose(merged.calibration, whole.calibration, rtol=1e-12)
    assert merged.main_metric() == pytest.approx(whole.main_metric(), rel=1e-12)


@pytest.mark.parametrize("task", ["binary", "multiclass", "regression"])
def test_taking_cases_out_equals_the_tally_of_the_cases_left(task: str) -> None:
    """``without`` inverts ``merged`` (Chan, Golub & LeVeque's update solved
    for the other half): the rest equals the tally of the cases never added,
    counts exactly; taking everything out leaves an empty tally."""
    rng = np.random.default_rng(5)
    n = 600
    if task == "binary":
        y, scores = binary_cases(5, n)
    elif task == "multiclass":
        scores = rng.dirichlet(np.ones(3), n)
        y = rng.integers(0, 3, n)
    else:
        y = rng.normal(50.0, 4.0, n)
        scores = (y + rng.normal(0.0, 1.0, n))[:, None]
    gone = rng.uniform(size=n) < 0.3
    whole = Tally.of(task, y, scores)
    rest = whole.without(Tally.of(task, y[gone], scores[gone]))
    kept = Tally.of(task, y[~gone], scores[~gone])
    assert (rest.n, rest.correct) == (kept.n, kept.correct)
    for name, value in kept.metrics().items():
        assert rest.metrics()[name] == pytest.approx(value, rel=1e-9), name
    assert np.allclose(rest.calibration, kept.calibration, rtol=1e-12, atol=1e-9)
    if task == "binary":
        assert np.array_equal(rest.auc_histogram, kept.auc_histogram)
    assert whole.without(whole).metrics() == {"n": 0}
    with pytest.raises(InvalidInputError):
        kept.without(whole)


def test_an_empty_tally_reports_only_its_count_and_tasks_do_not_mix() -> None:
    assert Tally("binary").metrics() == {"n": 0}
    assert Tally("binary").main_metric() is None
    with pytest.raises(InvalidInputError):
        Tally("binary").merged(Tally("regression"))


def test_roc_auc_waits_for_both_classes() -> None:
    only_positive = Tally.of("binary", np.ones(5, dtype=np.int64), np.full((5, 1), 0.7))
    assert "roc_auc" not in only_positive.metrics()


# Page-Hinkley (Page 1954, "Continuous inspection schemes", Biometrika 41:100-115),
# in its running-mean form. The bound below is derived here, not taken from a source.
#
# Stream: x_t = mu0 + e_t for t <= N0, then mu0 + D + e_t, with |e_t| <= h.
# For the j-th case after the step, xbar <= mu0 + h + D j/(N0+j) and x >= mu0 + D - h,
# so its increment x - xbar - delta >= D N0/(N0+j) - 2h - delta >= D/2 - 2h - delta
# for j <= N0. The statistic m_t - min m >= m_t - m_N0 >= k (D/2 - 2h - delta) after
# k cases, so it crosses threshold lambda by k = floor(lambda / (D/2 - 2h - delta)) + 1
# (if that is <= N0).
def test_page_hinkley_raises_on_a_step_change_within_the_derived_bound() -> None:
    rng = np.random.default_rng(11)
    n0, mu0, step, h, delta, threshold = 5000, 0.15, 0.3, 0.05, 0.02, 20.0
    noise = rng.uniform(-h, h, 2 * n0)
    losses = mu0 + noise
    losses[n0:] += step
    bound = int(threshold // (step / 2 - 2 * h - delta)) + 1
    assert bound <= n0
    state = page_hinkley(AlarmState(), losses[:n0], delta, threshold)
    assert state.raised_at is None, "quiet before the step"
    # Fed in uneven batches: the vectorised test carries its state across calls.
    for part in np.array_split(losses[n0:], 13):
        state = page_hinkley(state, part, delta, threshold)
    assert state.raised_at is not None
    assert n0 < state.raised_at <= n0 + bound
    assert state.n == 2 * n0


def test_page_hinkley_in_batches_equals_one_pass() -> None:
    losses = np.random.default_rng(5).exponential(0.2, 3000)
    whole = page_hinkley(AlarmState(), losses, 0.01, 5.0)
    state = AlarmState()
    for part in np.array_split(losses, 17):
        state = page_hinkley(state, part, 0.01, 5.0)
    assert state.raised_at == whole.raised_at
    assert state.cumulative == pytest.approx(whole.cumulative, rel=1e-9)
    assert state.minimum == pytest.approx(whole.minimum, rel=1e-9)


@pytest.mark.parametrize("seed", range(5))
def test_page_hinkley_stays_calm_on_10000_stationary_classification_cases(seed: int) -> None:
    # A calibrated binary model: y ~ Bernoulli(p); its Brier losses are stationary.
    # Parameters: the binary defaults (engine.spec.ALARM_DEFAULTS).
    from engine.spec import ALARM_DEFAULTS
    y, scores = binary_cases(seed, 10_000)
    defaults = ALARM_DEFAULTS["binary"]
    state = page_hinkley(AlarmState(), case_losses("binary", y, scores),
                         defaults["delta"], defaults["threshold"])
    assert state.raised_at is None
    assert state.n == 10_000


@pytest.mark.parametrize("seed", range(5))
def test_page_hinkley_stays_calm_on_10000_stationary_regression_cases(seed: int) -> None:
    from engine.spec import ALARM_DEFAULTS
    rng = np.random.default_rng(seed)
    errors = np.abs(rng.normal(0.0, 3.0, 10_000))
    defaults = ALARM_DEFAULTS["regression"]
    state = AlarmState()
    for part in np.array_split(errors, 10):
        state = page_hinkley(state, relative_errors(state, part), defaults["delta"],
                             defaults["threshold"], errors=part)
    assert state.raised_at is None


def test_relative_errors_are_scale_free() -> None:
    errors = np.abs(np.random.default_rng(2).normal(0.0, 1.0, 500))
    assert relative_errors(AlarmState(), errors * 1000.0) == pytest.approx(
        relative_errors(AlarmState(), errors))
    assert relative_errors(AlarmState(), np.array([0.0, 2.0]))[1] == 100.0
