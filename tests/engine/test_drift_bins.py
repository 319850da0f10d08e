"""Reference bins (engine/drift_bins.py): the grid, its deciles, levels and
"other", and a comparison that sees a shift and not its absence."""

from __future__ import annotations

import numpy as np
import pytest

from engine.drift_bins import compare, reference_bins

FEATURES = [
    {"name": "bearing_temp_c", "type": "numeric"},
    {"name": "pump_family", "type": "categorical", "levels": ["screw", "centrifugal"]},
    {"name": "has_vfd", "type": "boolean"},
]


def rows(n: int, seed: int, temp_shift: float = 0.0) -> list[dict]:
    rng = np.random.default_rng(seed)
    temps = rng.normal(60.0 + temp_shift, 5.0, n)
    return [{"bearing_temp_c": float(t), "pump_family": "screw" if i % 3 else "centrifugal",
             "has_vfd": bool(i % 2)} for i, t in enumerate(temps)]


def counts_of(bins, data):
    out = np.zeros(bins.size, dtype=np.int64)
    for row in data:
        out[bins.bin_of(row[bins.name])] += 1
    return out


def test_numeric_grid_is_percentiles_and_deciles_are_unions_of_its_bins():
    temp, _, _ = reference_bins(FEATURES, rows(10_000, 1))
    assert temp.size == 100  # 99 distinct percentiles: 100 bins
    assert temp.reference.sum() == 10_000
    # Each percentile bin holds 1% of the reference, each decile 10%.
    assert np.all(np.abs(temp.reference - 100) <= 1)
    deciles = temp.psi_counts(temp.reference)
    assert len(deciles) == 10 and np.all(np.abs(deciles - 1000) <= 1)
    # bin_of agrees with the counts the reference was binned with.
    np.testing.assert_array_equal(counts_of(temp, rows(10_000, 1)), temp.reference)


def test_levels_take_other_and_booleans_two_bins():
    _, family, vfd = reference_bins(FEATURES, rows(30, 2))
    assert family.labels == ("screw", "centrifugal", "other")
    assert family.bin_of("submersible") == 2
    assert family.reference.tolist() == [20, 10, 0]
    assert vfd.labels == ("false", "true") and vfd.reference.tolist() == [15, 15]


def test_ties_merge_grid_edges():
    data = [{"bearing_temp_c": float(i % 3), "pump_family": "screw", "has_vfd": True}
            for i in range(300)]
    temp = reference_bins(FEATURES, data)[0]
    assert temp.edges == (0.0, 1.0, 2.0)
    assert temp.reference.tolist() == [0, 100, 100, 100]


def test_compare_sees_a_shift_and_not_its_absence():
    reference = reference_bins(FEATURES, rows(10_000, 3))
    same, hotter = rows(5_000, 4), rows(5_000, 5, temp_shift=4.0)
    steady = compare(reference[0], counts_of(reference[0], same))
    shifted = compare(reference[0], counts_of(reference[0], hotter))
    assert steady.status == "steady" and steady.ks is not None and steady.ks.p_value > 0.001
    assert shifted.status == "shifted" and shifted.ks is not None
    assert shifted.ks.p_value < 1e-6 and shifted.chi_square is None
    family = compare(reference[1], counts_of(reference[1], same))
    assert family.ks is None and family.chi_square is not None
    assert family.chi_square.dof == 1 and family.status == "steady"


def test_an_empty_reference_compares_to_nothing():
    temp, family, _ = reference_bins(FEATURES, [])
    assert temp.size == 1
    result = compare(temp, np.array([5]))
    assert result.status is None and result.ks is None
    assert compare(family, np.array([1, 2, 0])).chi_square is None


@pytest.mark.parametrize("value", [-1e300, 59.9, 60.0, 1e300])
def test_bin_of_numeric_is_in_range(value):
    temp = reference_bins(FEATURES, rows(1000, 6))[0]
    assert 0 <= temp.bin_of(value) < temp.size
