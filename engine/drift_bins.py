"""A version's reference for drift: each field's bins, fixed from the records
it learned from, and how many of those records fell in each.

Numeric fields get a fine grid (the reference's percentiles, ties merged) for
the Kolmogorov–Smirnov comparison, and PSI's deciles are unions of its bins:
the deciles are percentiles too, computed the same way, so each decile edge is
a grid edge. Categorical fields get their declared levels and ``other`` (a
level the model never declared cannot be served, but a spec's levels are its
whole vocabulary only while the spec stands); booleans get false and true.

``FieldBins.bin_of`` is on the hot path of every prediction (the service's
drift tally calls it per field per record): one bisect or one dict lookup.
"""

from __future__ import annotations

import bisect
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine.drift import (
    ChiSquareResult,
    KsResult,
    chi_square_homogeneity,
    ks_from_counts,
    psi,
    psi_status,
)

# The grid: percentiles 1..99 of the reference (exact fractions k / 100, so the
# deciles k / 10 land on the same numbers).
GRID_QUANTILES = np.arange(1, 100) / 100
DECILE_QUANTILES = np.arange(1, 10) / 10
OTHER_LEVEL = "other"


@dataclass(frozen=True)
class FieldBins:
    """One field's bins and the reference's counts over them.

    ``labels``: each bin's name as answered (numeric: its lower edge, the first
    "-inf"); ``psi_group``: for each bin, the PSI bin it belongs to (numeric:
    its decile; otherwise itself), ``psi_labels`` those bins' names."""

    name: str
    kind: str  # "numeric", "categorical" or "boolean"
    edges: tuple[float, ...]
    levels: Mapping[Any, int]
    labels: tuple[str, ...]
    psi_group: NDArray[np.intp]
    psi_labels: tuple[str, ...]
    reference: NDArray[np.int64]
    _other: int = field(default=0, repr=False)

    @property
    def size(self) -> int:
        return len(self.labels)

    def bin_of(self, value: Any) -> int:
        """The bin of one validated value of this field."""
        if self.kind == "numeric":
            return bisect.bisect_right(self.edges, value)
        if self.kind == "boolean":
            return 1 if value else 0
        return self.levels.get(value, self._other)

    def psi_counts(self, counts: NDArray[np.int64]) -> NDArray[np.int64]:
        """Counts over this field's bins summed into its PSI bins."""
        return np.bincount(self.psi_group, weights=counts,
                           minlength=len(self.psi_labels)).astype(np.int64)


@dataclass(frozen=True)
class FieldDrift:
    """One field compared: PSI and its status, and KS (numeric) or chi-square."""

    psi: float
    status: str | None
    ks: KsResult | None
    chi_square: ChiSquareResult | None


def compare(bins: FieldBins, recent: NDArray[np.int64]) -> FieldDrift:
    """``recent`` counts over ``bins`` against the reference's."""
    value = psi(bins.psi_counts(bins.reference), bins.psi_counts(recent))
    if bins.kind == "numeric":
        return FieldDrift(value, psi_status(value), ks_from_counts(bins.reference, recent), None)
    return FieldDrift(value, psi_status(value), None,
                      chi_square_homogeneity(bins.reference, recent))


def reference_bins(features: Sequence[Mapping[str, Any]],
                   rows: Sequence[Mapping[str, Any]]) -> tuple[FieldBins, ...]:
    """Each declared feature's bins (``features``: the spec's list) fixed from
    ``rows`` (validated feature mappings), with ``rows`` counted in them."""
    out = []
    for feature in features:
        name, kind = feature["name"], feature["type"]
        values = [row[name] for row in rows]
        if kind == "numeric":
            out.append(_numeric(name, np.asarray(values, dtype=np.float64)))
        else:
            out.append(_levels(name, kind, feature.get("levels") or (), values))
    return tuple(out)


def _numeric(name: str, values: NDArray[np.float64]) -> FieldBins:
    if len(values):
        edges = np.unique(np.quantile(values, GRID_QUANTILES))
        deciles = np.unique(np.quantile(values, DECILE_QUANTILES))
    else:
        edges = deciles = np.empty(0)
    edge_list = tuple(float(e) for e in edges)
    # Bin 0 is below the first edge (decile 0); bin i > 0 starts at edge i - 1.
    group = np.zeros(len(edge_list) + 1, dtype=np.intp)
    group[1:] = np.searchsorted(deciles, edges, side="right")
    labels = ("-inf", *(repr(e) for e in edge_list))
    psi_labels = ("-inf", *(repr(float(e)) for e in deciles))
    counts = np.bincount(np.searchsorted(edges, values, side="right"),
                         minlength=len(labels)).astype(np.int64)
    return FieldBins(name, "numeric", edge_list, {}, labels, group, psi_labels, counts)


def _levels(name: str, kind: str, declared: Sequence[Any], values: Sequence[Any]) -> FieldBins:
    if kind == "boolean":
        labels: tuple[str, ...] = ("false", "true")
        levels: dict[Any, int] = {False: 0, True: 1}
    else:
        levels = {level: position for position, level in enumerate(declared)}
        labels = (*(str(level) for level in declared), OTHER_LEVEL)
    other = len(labels) - 1
    bins = FieldBins(name, kind, (), levels, labels, np.arange(len(labels), dtype=np.intp),
                     labels, np.zeros(len(labels), dtype=np.int64), other)
    counts = np.bincount([bins.bin_of(v) for v in values], minlength=len(labels))
    return FieldBins(name, kind, (), levels, labels, bins.psi_group, labels,
                     counts.astype(np.int64), other)
