"""Comparing two snapshots bit for bit: the first thing that differs, named.

Two snapshots of the same state are not the same bytes (the npz archive
stamps each entry with the time it was written), so the comparison is of
what they hold: every array bit for bit (its dtype, shape and the bytes of
each value, so -0.0 differs from 0.0 and a NaN equals only the same NaN),
then the metadata (spec, counters, optimizer step count, encoder, extra).

The weights and the optimizer state come first, in network order, and an
index into them is named by layer: ``layer 2 weights[3, 7]`` is the weight
from unit 3 of layer 2's input to its unit 7, ``layer 2 biases[7]`` that
unit's bias (engine/network.py lays every layer out as its weights then its
bias row).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from engine import snapshot

# Compared first, in this order; any other array after them, by name.
LEADING = ("params",)
OPTIMIZER_PREFIX = "optimizer."


@dataclass(frozen=True)
class Difference:
    """The first thing two snapshots hold differently: ``what`` names it
    (an array entry and index, or a metadata key), with both values and,
    for numbers, how far apart they are."""

    what: str
    stored: Any
    rebuilt: Any
    by: float | None = None

    def describe(self) -> str:
        text = f"{self.what}: stored {self.stored!r}, rebuilt {self.rebuilt!r}"
        return text if self.by is None else f"{text} (differs by {self.by:.17g})"


def first_difference(stored: bytes, rebuilt: bytes) -> Difference | None:
    """None when the two snapshots hold the same state bit for bit, else the
    first difference (SnapshotError if either cannot be read)."""
    stored_arrays, stored_meta = snapshot.load(stored)
    rebuilt_arrays, rebuilt_meta = snapshot.load(rebuilt)
    sizes = stored_meta.get("sizes")
    for name in _order(stored_arrays, rebuilt_arrays):
        found = _array_difference(name, stored_arrays.get(name), rebuilt_arrays.get(name),
                                  sizes)
        if found is not None:
            return found
    return _meta_difference("", stored_meta, rebuilt_meta)


def _order(*arrays: Mapping[str, Any]) -> list[str]:
    names = set().union(*arrays)
    optimizer = sorted(name for name in names if name.startswith(OPTIMIZER_PREFIX))
    rest = sorted(names - set(LEADING) - set(optimizer))
    return [name for name in LEADING if name in names] + optimizer + rest


def _array_difference(name: str, stored: NDArray[Any] | None, rebuilt: NDArray[Any] | None,
                      sizes: Sequence[int] | None) -> Difference | None:
    if stored is None or rebuilt is None:
        return Difference(name, "present" if stored is not None else "absent",
                          "present" if rebuilt is not None else "absent")
    if stored.dtype != rebuilt.dtype or stored.shape != rebuilt.shape:
        return Difference(f"{name} (dtype, shape)", (str(stored.dtype), stored.shape),
                          (str(rebuilt.dtype), rebuilt.shape))
    a, b = np.ascontiguousarray(stored), np.ascontiguousarray(rebuilt)
    if a.tobytes() == b.tobytes():  # the common case: one pass, no index work
        return None
    width = a.dtype.itemsize
    a_bytes = a.reshape(-1).view(np.uint8).reshape(-1, width)
    b_bytes = b.reshape(-1).view(np.uint8).reshape(-1, width)
    at = int(np.flatnonzero((a_bytes != b_bytes).any(axis=1))[0])
    old, new = a.reshape(-1)[at].item(), b.reshape(-1)[at].item()
    by = abs(float(new) - float(old)) if isinstance(old, int | float) and not isinstance(
        old, bool) else None
    return Difference(_name_index(name, at, a.shape, sizes), old, new, by)


def _name_index(name: str, at: int, shape: tuple[int, ...],
                sizes: Sequence[int] | None) -> str:
    """``params`` and the optimizer's per-parameter arrays by layer; others
    by their own index."""
    per_parameter = name == "params" or name.startswith(OPTIMIZER_PREFIX)
    if per_parameter and sizes and len(shape) == 1:
        offset = 0
        for layer, (fan_in, fan_out) in enumerate(zip(sizes[:-1], sizes[1:], strict=True),
                                                  start=1):
            size = (fan_in + 1) * fan_out
            if at < offset + size:
                row, column = divmod(at - offset, fan_out)
                part = f"biases[{column}]" if row == fan_in else f"weights[{row}, {column}]"
                return f"{name}: layer {layer} {part} (flat index {at})"
            offset += size
    index = np.unravel_index(at, shape) if shape else ()
    return f"{name}[{', '.join(str(int(i)) for i in index)}]"


def _meta_difference(path: str, stored: Any, rebuilt: Any) -> Difference | None:
    if isinstance(stored, dict) and isinstance(rebuilt, dict):
        for key in sorted(set(stored) | set(rebuilt)):
            inner = f"{path}.{key}" if path else f"metadata {key}"
            if key not in stored or key not in rebuilt:
                return Difference(inner, stored.get(key, "absent"), rebuilt.get(key, "absent"))
            found = _meta_difference(inner, stored[key], rebuilt[key])
            if found is not None:
                return found
        return None
    if type(stored) is not type(rebuilt) or stored != rebuilt:
        by = None
        if isinstance(stored, int | float) and isinstance(rebuilt, int | float):
            by = abs(float(rebuilt) - float(stored))
        return Difference(path, stored, rebuilt, by)
    return None
