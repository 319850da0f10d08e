"""What a loaded version costs in memory, and a least-recently-used map held to a byte budget.

A version's cost is measured, not assumed: on load, every object reachable
from the rebuilt learner (weights, optimizer state, encoders, the spec, its
arrays) is counted once with ``sys.getsizeof`` (an array that owns its data
counts that data); code, classes and modules are shared by all versions and
not counted. The network's workspace pool grows as requests of new shapes
come (it is bounded, engine/network.py) and is re-read whenever the budget is
checked, so the figure stays what the process holds.
"""

from __future__ import annotations

import gc
import sys
import threading
import types
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import Any, Generic, TypeVar

K = TypeVar("K", bound=Hashable)
V = TypeVar("V")
MIB = 1024 * 1024
_SHARED = (type, types.ModuleType, types.FunctionType, types.BuiltinFunctionType,
           types.CodeType, types.MethodType)


def resident_bytes(root: object) -> int:
    """Bytes of the objects reachable from ``root`` (each counted once)."""
    seen: set[int] = set()
    pending = [root]
    total = 0
    while pending:
        obj = pending.pop()
        if id(obj) in seen or isinstance(obj, _SHARED):
            continue
        seen.add(id(obj))
        total += sys.getsizeof(obj)
        pending.extend(gc.get_referents(obj))
    return total


def pooled_bytes(learner: Any) -> int:
    """The workspace pool of an engine learner's network, as held now."""
    network = getattr(learner, "network", None)
    return int(network.pooled_bytes()) if network is not None else 0


class BudgetLRU(Generic[K, V]):
    """A thread-safe mapping that forgets its least recently used entries while
    their cost is over ``budget`` bytes (the newest entry is always kept).

    ``cost(value)`` is the entry's measured bytes when put; ``extra(value)``
    what it has grown by since (read at each put, O(entries), misses only)."""

    def __init__(self, budget: int, cost: Callable[[V], int],
                 extra: Callable[[V], int] = lambda _: 0) -> None:
        if budget < 1:
            raise ValueError("budget must be at least 1 byte")
        self.budget = budget
        self._cost, self._extra = cost, extra
        self._items: OrderedDict[K, tuple[V, int]] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: K) -> V | None:
        with self._lock:
            found = self._items.get(key)
            if found is None:
                return None
            self._items.move_to_end(key)
            return found[0]

    def put(self, key: K, value: V) -> None:
        cost = self._cost(value)  # outside the lock: a graph walk
        with self._lock:
            self._items[key] = (value, cost)
            self._items.move_to_end(key)
            total = self._total()
            while total > self.budget and len(self._items) > 1:
                old, held = self._items.popitem(last=False)[1]
                total -= held + self._extra(old)

    def _total(self) -> int:
        return sum(cost + self._extra(value) for value, cost in self._items.values())

    def usage(self) -> dict[str, Any]:
        """Entries, bytes held and the mean per entry (reported by benchmarks and /metrics)."""
        with self._lock:
            count, total = len(self._items), self._total()
        return {"entries": count, "bytes": total, "budget_bytes": self.budget,
                "mean_bytes_per_entry": round(total / count) if count else None}

    def __len__(self) -> int:
        return len(self._items)

    def __contains__(self, key: object) -> bool:
        return key in self._items
