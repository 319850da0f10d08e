"""Drift statistics (engine/drift.py): PSI worked by hand, KS and chi-square
checked against SciPy (scipy.stats.ks_2samp, scipy.stats.kstwobign,
scipy.stats.chi2_contingency, scipy.stats.chi2) on the same samples or counts."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from engine.drift import (
    chi2_sf,
    chi_square_homogeneity,
    kolmogorov_sf,
    ks_from_counts,
    ks_p_value,
    ks_statistic,
    psi,
    psi_status,
)


def test_psi_on_two_bins_worked_by_hand():
    # Reference 50 / 50, recent 80 / 20 (shares 0.5, 0.5 and 0.8, 0.2):
    # (0.8 - 0.5) ln(0.8 / 0.5) + (0.2 - 0.5) ln(0.2 / 0.5)
    # = 0.3 x 0.4700036 + (-0.3) x (-0.9162907) = 0.1410011 + 0.2748872 = 0.4158883
    assert psi([50, 50], [80, 20]) == pytest.approx(0.4158883, abs=1e-7)
    assert psi_status(0.4158883) == "shifted"


def test_psi_floors_an_empty_bin_at_epsilon():
    # Reference 100 / 0, recent 50 / 50: the empty reference share becomes 1e-4,
    # (0.5 - 1) ln(0.5 / 1) + (0.5 - 1e-4) ln(0.5 / 1e-4)
    # = 0.3465736 + 0.4999 x 8.5171932 = 0.3465736 + 4.2577449 = 4.6043185
    assert psi([100, 0], [50, 50]) == pytest.approx(4.6043185, abs=1e-6)


def test_psi_of_identical_shares_is_zero_and_of_an_empty_side_is_nan():
    assert psi([10, 20, 30], [1, 2, 3]) == pytest.approx(0.0, abs=1e-15)
    assert math.isnan(psi([10, 20], [0, 0]))
    assert psi_status(math.nan) is None


@pytest.mark.parametrize(("value", "status"), [
    (0.0, "steady"), (0.0999, "steady"), (0.1, "shifting"), (0.2499, "shifting"),
    (0.25, "shifted"), (3.0, "shifted")])
def test_psi_status_thresholds(value, status):
    # Thresholds 0.1 and 0.25: common practice, no source.
    assert psi_status(value) == status


@pytest.mark.parametrize("x", [0.05, 0.3, 0.6, 0.9, 1.1, 1.17, 1.19, 1.5, 2.0, 3.0, 6.0])
def test_kolmogorov_survival_matches_scipy_kstwobign(x):
    assert kolmogorov_sf(x) == pytest.approx(stats.kstwobign.sf(x), rel=1e-9, abs=1e-15)


@pytest.mark.parametrize(("n", "m", "shift", "seed"), [
    (50, 80, 0.0, 1), (200, 150, 0.3, 2), (1000, 1000, 0.05, 3), (5000, 2000, 0.0, 4),
    (400, 3000, 0.2, 5)])
def test_ks_statistic_equals_scipy_ks_2samp_and_p_value_is_close(n, m, shift, seed):
    rng = np.random.default_rng(seed)
    a, b = rng.normal(size=n), rng.normal(shift, 1.0, size=m)
    reference = stats.ks_2samp(a, b, method="asymp")
    assert ks_statistic(a, b) == pytest.approx(reference.statistic, abs=1e-12)
    # Ours is the Kolmogorov limit (scipy.stats.kstwobign) at Stephens' (1970)
    # corrected argument, exactly; SciPy's asymptotic p-value is the finite-n
    # one-sample distribution at round(nm/(n+m)): the two agree to about 0.02
    # at 50 records a side (measured here), closer with more.
    root = math.sqrt(n * m / (n + m))
    corrected = stats.kstwobign.sf((root + 0.12 + 0.11 / root) * reference.statistic)
    ours = ks_p_value(reference.statistic, n, m)
    assert ours == pytest.approx(corrected, rel=1e-9, abs=1e-15)
    assert ours == pytest.approx(reference.pvalue, abs=0.025, rel=0.1)


def test_ks_from_counts_is_exact_when_every_value_has_its_own_bin():
    rng = np.random.default_rng(7)
    a = np.round(rng.normal(size=300), 1)  # ties on both sides
    b = np.round(rng.normal(0.4, 1.2, size=200), 1)
    edges = np.unique(np.concatenate([a, b]))
    # bin i holds [edge i-1, edge i): one bin per distinct value, plus an empty first bin.
    bins = np.arange(len(edges) + 1)
    count_a = np.bincount(np.searchsorted(edges, a, side="right"), minlength=len(bins))
    count_b = np.bincount(np.searchsorted(edges, b, side="right"), minlength=len(bins))
    result = ks_from_counts(count_a, count_b)
    expected = stats.ks_2samp(a, b, method="asymp").statistic
    assert result is not None
    assert result.statistic == pytest.approx(expected, abs=1e-12)
    assert result.statistic_bound >= result.statistic


def test_ks_from_coarse_counts_brackets_the_sample_statistic():
    rng = np.random.default_rng(8)
    a, b = rng.normal(size=2000), rng.normal(0.25, 1.0, size=1500)
    edges = np.quantile(a, np.linspace(0.01, 0.99, 99))
    count_a = np.bincount(np.searchsorted(edges, a, side="right"), minlength=100)
    count_b = np.bincount(np.searchsorted(edges, b, side="right"), minlength=100)
    result = ks_from_counts(count_a, count_b)
    exact = stats.ks_2samp(a, b).statistic
    assert result is not None
    assert result.statistic <= exact + 1e-12 <= result.statistic_bound + 2e-12
    assert result.statistic_bound - result.statistic < 0.05
    assert ks_from_counts([0, 0], [1, 2]) is None


@pytest.mark.parametrize(("statistic", "dof"), [
    (0.001, 1), (0.5, 1), (3.84, 1), (12.0, 1), (2.0, 3), (7.8, 3), (40.0, 3),
    (9.0, 10), (30.0, 10), (200.0, 50), (1e-6, 20), (500.0, 4)])
def test_chi_square_survival_matches_scipy_chi2(statistic, dof):
    assert chi2_sf(statistic, dof) == pytest.approx(stats.chi2.sf(statistic, dof),
                                                    rel=1e-9, abs=1e-300)


@pytest.mark.parametrize(("reference", "recent"), [
    ([120, 80], [60, 40]),
    ([120, 80], [30, 70]),
    ([500, 300, 150, 50], [90, 80, 20, 10]),
    ([10, 0, 30, 5], [12, 0, 20, 9]),  # a level neither side saw is left out
    ([1000, 1, 1], [900, 60, 40]),
])
def test_chi_square_homogeneity_matches_scipy_chi2_contingency(reference, recent):
    table = np.array([reference, recent])
    table = table[:, table.sum(axis=0) > 0]
    statistic, p_value, dof, _ = stats.chi2_contingency(table, correction=False)
    result = chi_square_homogeneity(reference, recent)
    assert result is not None
    assert result.dof == dof
    assert result.statistic == pytest.approx(statistic, rel=1e-12)
    assert result.p_value == pytest.approx(p_value, rel=1e-9, abs=1e-300)


def test_chi_square_needs_two_levels_and_two_nonempty_sides():
    assert chi_square_homogeneity([10, 0], [5, 0]) is None
    assert chi_square_homogeneity([10, 3], [0, 0]) is None
