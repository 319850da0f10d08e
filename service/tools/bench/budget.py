"""`keelson bench budget`: what one budget unit of a prediction request costs here.

For each network shape and explanation method, the CPU time of explaining one
record (one BLAS thread, the minimum of a few repetitions, as an API process
runs) is divided by the units ``service.usecases.prediction_limits`` charges
for it. The largest figure among requests that take a noticeable time (0.3 s
or more for a full batch of 1,000 records: below that the fixed cost per
record, bounded by the batch limit, dominates) sets the budget that keeps one
request under ``target_seconds`` of one core: ``suggested_budget``, to compare
with ``KEELSON_PREDICTION_BUDGET``.

Weights are fresh (from a fixed seed): the cost does not depend on what the
network learned. Relu networks are measured too, since their integrated
gradients split the path where units switch, which adds rows.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from engine import Learner
from service.usecases.prediction_limits import request_cost

SHAPES: list[list[int]] = [[16], [32, 16], [64, 64], [128, 64], [256, 256], [512, 512],
                           [1024, 1024, 1024]]
METHODS: list[tuple[str, int, int]] = [
    ("gradient", 64, 32), ("integrated_gradients", 16, 32), ("integrated_gradients", 64, 32),
    ("integrated_gradients", 256, 32), ("integrated_gradients", 1024, 32),
    ("smoothgrad", 64, 32), ("smoothgrad", 64, 1024)]
INPUTS = 20
BATCH = 1000  # KEELSON_MAX_PREDICTION_BATCH's default
NOTICEABLE_SECONDS = 0.3


def _learner(hidden: Sequence[int], activation: str) -> tuple[Learner, np.ndarray]:
    spec = {"name": "bench", "task": "binary", "target": "y", "classes": ["a", "b"],
            "activation": activation, "hidden_layers": list(hidden),
            "features": [{"name": f"f{i}", "type": "numeric"} for i in range(INPUTS)]}
    rng = np.random.default_rng(0)
    rows = [{f"f{i}": float(v) for i, v in enumerate(row)}
            for row in rng.normal(size=(64, INPUTS))]
    learner = Learner.create(spec, warmup=rows)
    return learner, learner.encode(rows)


def _cpu_per_record(learner: Learner, X: np.ndarray, method: str, steps: int, samples: int,
                    count: int, repeats: int) -> float:
    best = float("inf")
    for _ in range(repeats):
        started = time.process_time()
        for i in range(count):
            learner.explain(X[i % len(X)], method=method, steps=steps, samples=samples)
        best = min(best, (time.process_time() - started) / count)
    return best


def run_budget_bench(shapes: Sequence[Sequence[int]] = tuple(SHAPES),
                     activations: Sequence[str] = ("tanh", "relu"),
                     methods: Sequence[tuple[str, int, int]] = tuple(METHODS),
                     target_seconds: float = 2.0, repeats: int = 3,
                     progress: Callable[[str], None] = lambda message: None) -> dict[str, Any]:
    from threadpoolctl import threadpool_limits

    cases: list[dict[str, Any]] = []
    with threadpool_limits(limits=1, user_api="blas"):
        for activation in activations:
            for hidden in shapes:
                learner, X = _learner(hidden, activation)
                network = learner.network
                parameters, units = int(network.params.size), sum(network.sizes[1:])
                progress(f"{activation} {INPUTS}-{'-'.join(map(str, hidden))}-1")
                for method, steps, samples in methods:
                    units_each = request_cost(1, method, steps, samples, parameters, units)
                    count = max(1, min(100, int(5e7 / units_each)))
                    seconds = _cpu_per_record(learner, X, method, steps, samples, count,
                                              repeats)
                    cases.append({"activation": activation, "hidden_layers": list(hidden),
                                  "parameters": parameters, "method": method, "steps": steps,
                                  "samples": samples, "us_per_record": round(seconds * 1e6, 1),
                                  "ns_per_unit": round(seconds / units_each * 1e9, 4),
                                  "seconds_per_batch": round(seconds * BATCH, 3)})
    noticeable = [c for c in cases if c["seconds_per_batch"] >= NOTICEABLE_SECONDS]
    worst = max(noticeable or cases, key=lambda c: c["ns_per_unit"])
    return {"benchmark": "budget", "target_seconds": target_seconds,
            "ns_per_unit_noticeable": [min(c["ns_per_unit"] for c in noticeable or cases),
                                       worst["ns_per_unit"]],
            "worst": worst,
            "suggested_budget": int(target_seconds / (worst["ns_per_unit"] * 1e-9)),
            "cases": cases}
