"""Drift statistics: how far recent inputs have moved from a reference.

Pure NumPy and the standard library; the service feeds it counts. Three
measures, each on the same binned counts of one field:

- the population stability index (PSI) over the reference's bins;
- the two-sample Kolmogorov–Smirnov statistic and its p-value, for numeric
  fields, from counts over a fine grid of the reference's quantiles (the
  statistic at the grid's edges, and an upper bound between them);
- the chi-square test of homogeneity and its p-value, for categorical and
  boolean fields.

The p-values are written here rather than taken from a library (SciPy is a
test dependency only): the Kolmogorov distribution's series, and the
regularized incomplete gamma function for the chi-square survival function.
tests/engine/test_drift.py checks them against scipy.stats.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

# A bin's share is floored at this before PSI takes its logarithm: an empty bin
# on either side would otherwise make PSI infinite. 1e-4 is common practice
# (no source); it caps one empty bin's term at about (share) * ln(share / 1e-4).
PSI_EPSILON = 1e-4
# The usual PSI thresholds (common practice, no source): below 0.1 steady,
# from 0.1 to 0.25 shifting, 0.25 and above shifted.
PSI_SHIFTING, PSI_SHIFTED = 0.1, 0.25
STATUSES = ("steady", "shifting", "shifted")


def psi(reference: ArrayLike, recent: ArrayLike, epsilon: float = PSI_EPSILON) -> float:
    """Population stability index of ``recent`` counts against ``reference``
    counts over the same bins: sum of (a - e) * ln(a / e) over bins, with ``e``
    and ``a`` the bins' shares of each total, each floored at ``epsilon``.

    NaN when either side counted nothing (there is nothing to compare)."""
    expected = np.asarray(reference, dtype=np.float64)
    actual = np.asarray(recent, dtype=np.float64)
    if expected.shape != actual.shape:
        raise ValueError("reference and recent counts must have the same bins")
    total_e, total_a = expected.sum(), actual.sum()
    if total_e <= 0 or total_a <= 0:
        return math.nan
    e = np.maximum(expected / total_e, epsilon)
    a = np.maximum(actual / total_a, epsilon)
    return float(np.sum((a - e) * np.log(a / e)))


def psi_status(value: float) -> str | None:
    """``steady``, ``shifting`` or ``shifted`` for a PSI (None for NaN)."""
    if math.isnan(value):
        return None
    if value < PSI_SHIFTING:
        return "steady"
    return "shifting" if value < PSI_SHIFTED else "shifted"


# ------------------------------------------------------------- Kolmogorov–Smirnov


def kolmogorov_sf(x: float) -> float:
    """P(K > x) for the Kolmogorov distribution (the limit of sqrt(n) * D_n).

    Two series for the same function (Kolmogorov 1933; the second by the
    Jacobi theta identity), each fast where the other is slow:
    1 - sqrt(2 pi)/x * sum exp(-(2k-1)^2 pi^2 / (8 x^2)) below x = 1.18,
    2 * sum (-1)^(k-1) exp(-2 k^2 x^2) above.
    """
    if x <= 0:
        return 1.0
    if x < 1.18:
        term = math.pi ** 2 / (8 * x * x)
        total = sum(math.exp(-(2 * k - 1) ** 2 * term) for k in range(1, 8))
        return min(1.0, max(0.0, 1.0 - math.sqrt(2 * math.pi) / x * total))
    total = sum((1.0 if k % 2 else -1.0) * math.exp(-2 * k * k * x * x) for k in range(1, 101))
    return min(1.0, max(0.0, 2.0 * total))


def ks_p_value(statistic: float, n: float, m: float) -> float:
    """Two-sided p-value of a two-sample KS statistic with sample sizes ``n``
    and ``m``, from the asymptotic Kolmogorov distribution at
    (sqrt(N) + 0.12 + 0.11 / sqrt(N)) * D with N = n m / (n + m): Stephens'
    (1970) small-sample correction, which brings the limit close to the
    finite-sample distribution already at a few dozen records."""
    if n <= 0 or m <= 0:
        return math.nan
    root = math.sqrt(n * m / (n + m))
    return kolmogorov_sf((root + 0.12 + 0.11 / root) * statistic)


def ks_statistic(a: ArrayLike, b: ArrayLike) -> float:
    """The two-sample KS statistic of two samples: the largest distance
    between their empirical distribution functions (exact)."""
    x = np.sort(np.asarray(a, dtype=np.float64))
    y = np.sort(np.asarray(b, dtype=np.float64))
    points = np.concatenate([x, y])
    fx = np.searchsorted(x, points, side="right") / len(x)
    fy = np.searchsorted(y, points, side="right") / len(y)
    return float(np.max(np.abs(fx - fy)))


@dataclass(frozen=True, slots=True)
class KsResult:
    """A KS comparison from binned counts: ``statistic`` is the exact distance
    of the two empirical distribution functions at the bins' edges (a lower
    bound of the samples' statistic); ``statistic_bound`` an upper bound of
    it (the distributions may part further between two edges, by at most what
    either side puts in one bin); ``p_value`` is that of ``statistic``."""

    statistic: float
    statistic_bound: float
    p_value: float


def ks_from_counts(reference: ArrayLike, recent: ArrayLike) -> KsResult | None:
    """The KS comparison of two samples counted over the same ordered bins
    (bin i holds the values in [edge i-1, edge i)). None when a side is empty.

    When every distinct value of both samples starts a bin of its own,
    ``statistic`` is the exact two-sample statistic (the bound, which does not
    know where in a bin the values sit, stays above it)."""
    r = np.asarray(reference, dtype=np.float64)
    s = np.asarray(recent, dtype=np.float64)
    n, m = r.sum(), s.sum()
    if n <= 0 or m <= 0:
        return None
    # F(edge i-) for each side: the share strictly below each upper edge.
    fr = np.concatenate([[0.0], np.cumsum(r) / n])
    fs = np.concatenate([[0.0], np.cumsum(s) / m])
    statistic = float(np.max(np.abs(fr - fs)))
    # Inside bin i each side's F lies between its values at the bin's edges.
    bound = float(max(np.max(fr[1:] - fs[:-1]), np.max(fs[1:] - fr[:-1]), statistic))
    return KsResult(statistic, min(bound, 1.0), ks_p_value(statistic, n, m))


# ---------------------------------------------------------------- chi-square


def regularized_gamma_q(a: float, x: float) -> float:
    """Q(a, x) = Gamma(a, x) / Gamma(a), the regularized upper incomplete gamma
    function: its series below x = a + 1, its continued fraction (modified
    Lentz) above (Press et al., Numerical Recipes, 3rd ed., section 6.2)."""
    if x <= 0:
        return 1.0
    log_front = a * math.log(x) - x - math.lgamma(a)
    if x < a + 1:
        term = total = 1.0 / a
        ap = a
        for _ in range(10_000):
            ap += 1
            term *= x / ap
            total += term
            if abs(term) < abs(total) * 1e-16:
                break
        return max(0.0, 1.0 - total * math.exp(log_front))
    tiny = 1e-300
    b = x + 1 - a
    c = 1.0 / tiny
    d = 1.0 / b
    h = d
    for i in range(1, 10_000):
        an = -i * (i - a)
        b += 2
        d = an * d + b
        d = tiny if abs(d) < tiny else d
        c = b + an / c
        c = tiny if abs(c) < tiny else c
        d = 1.0 / d
        delta = d * c
        h *= delta
        if abs(delta - 1) < 1e-16:
            break
    return min(1.0, math.exp(log_front) * h)


def chi2_sf(statistic: float, dof: int) -> float:
    """P(X > statistic) for X chi-square with ``dof`` degrees of freedom."""
    return regularized_gamma_q(dof / 2.0, statistic / 2.0)


@dataclass(frozen=True, slots=True)
class ChiSquareResult:
    statistic: float
    dof: int
    p_value: float


def chi_square_homogeneity(reference: Sequence[float] | ArrayLike,
                           recent: Sequence[float] | ArrayLike) -> ChiSquareResult | None:
    """Pearson's chi-square test that two samples counted over the same levels
    come from one distribution (the 2 x k table reference/recent by level).

    Levels neither side saw are left out (they carry no information and
    would divide by zero); dof = levels seen - 1. No continuity correction.
    None when a side is empty or fewer than two levels were seen."""
    table = np.vstack([np.asarray(reference, dtype=np.float64),
                       np.asarray(recent, dtype=np.float64)])
    table = table[:, table.sum(axis=0) > 0]
    rows = table.sum(axis=1)
    if table.shape[1] < 2 or np.any(rows <= 0):
        return None
    expected: NDArray[np.float64] = np.outer(rows, table.sum(axis=0)) / table.sum()
    statistic = float(np.sum((table - expected) ** 2 / expected))
    dof = table.shape[1] - 1
    return ChiSquareResult(statistic, dof, chi2_sf(statistic, dof))
