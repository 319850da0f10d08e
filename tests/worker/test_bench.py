"""The worker benchmark runs end to end on a small record count (its figures
are measured by `keelson bench worker`, not checked here: timing on a shared
CI machine says nothing)."""

from __future__ import annotations

from service.tools.bench.worker import run_worker_bench


def test_the_worker_benchmark_measures_online_and_retrain_on_a_small_stream(
    sqlite_url: str,
) -> None:
    result = run_worker_bench(sqlite_url, records=1500)
    figures = result["database"]
    online, retrain = figures["online"], figures["retrain"]
    assert online["all_records"] == 1500
    assert 0 < online["train_records"] < 1500 and online["worker_seconds_to_lag_0"] > 0
    assert online["engine_learn_records_per_s"] > 0 and online["ratio"] > 0
    assert retrain["job_status"] == "succeeded" and retrain["job_error"] is None
    assert retrain["epochs"] >= 1 and retrain["ratio"] > 0
    assert figures["peak_rss_mib"]["after_online"] > 0
