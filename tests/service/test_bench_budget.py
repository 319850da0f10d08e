"""`keelson bench budget` on a small set: it charges each case what the API
would (service.usecases.prediction_limits) and suggests the budget that fits
its target from the costliest unit measured."""

from __future__ import annotations

from service.tools.bench.budget import run_budget_bench
from service.usecases.prediction_limits import request_cost


def test_the_budget_bench_divides_measured_time_by_the_units_charged() -> None:
    result = run_budget_bench(shapes=[[8]], activations=["tanh"],
                              methods=[("gradient", 64, 32), ("integrated_gradients", 8, 32)],
                              target_seconds=2.0, repeats=1)
    cases = result["cases"]
    assert [c["method"] for c in cases] == ["gradient", "integrated_gradients"]
    for case in cases:
        assert case["parameters"] == (20 + 1) * 8 + (8 + 1) * 1
        units = request_cost(1, case["method"], case["steps"], case["samples"],
                             case["parameters"], 8 + 1)
        # us_per_record is rounded to 0.1 us: the unit cost agrees within that.
        assert abs(case["ns_per_unit"] * units / 1e3 - case["us_per_record"]) <= 0.06
    worst = max(c["ns_per_unit"] for c in cases)  # none is noticeable at this size
    assert result["worst"]["ns_per_unit"] == worst
    assert result["suggested_budget"] == int(2.0 / (worst * 1e-9))
