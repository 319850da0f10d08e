"""`keelson bench scale` runs end to end at a small size, and what it reports
holds together: every model reached zero lag and learnt each of its train
records exactly once, with one worker and with two. Its speed figures are
measured by the command, not checked here (a shared CI machine's timing says
nothing)."""

from __future__ import annotations

from typing import Any

from service.tools.bench.scale import run_scale_bench
from service.tools.bench.scale.fleet_data import fleet_spec

MODELS, WORKERS = 6, (1, 2)


def check_run(run: dict[str, Any], models: int, workers: int) -> None:
    assert run["workers"] == workers
    checks = run["invariants"]
    assert checks["models"] == models
    assert checks["models_at_zero_lag"] == models, checks
    assert checks["models_with_records_seen_equal_to_train_records"] == models, checks
    assert checks["train_records_learnt"] == checks["train_records_stored"] > 0
    assert checks["mismatched_models"] == []
    assert checks["models_with_an_active_version"] == models  # auto promotion, first version
    # The backlog's train records, then the trickle's on top.
    assert 0 < run["train_records"] < checks["train_records_stored"]
    assert run["train_records_per_s"] > 0 and run["seconds_first_lease_to_all_zero_lag"] > 0
    assert run["longest_wait_s"] >= run["longest_lease_to_zero_lag_s"] > 0
    trickle = run["trickle"]
    assert trickle["records_per_model"] > 0 and trickle["longest_wait_s"] > 0
    assert trickle["target_longest_wait_s"] == 2 * trickle["lease_seconds"]
    assert len(run["per_worker"]) == workers
    for worker in run["per_worker"]:
        assert worker["exit_status"] == 0  # stopped by SIGTERM, cleanly
        assert worker["peak_rss_mib"] > 0 and worker["cpu_seconds_backlog"] >= 0


def check_report(result: dict[str, Any]) -> None:
    assert result["benchmark"] == "scale"
    settings = result["settings"]
    assert settings["models"] == MODELS and settings["workers"] == list(WORKERS)
    fleet = result["fleet"]
    assert [run["workers"] for run in fleet["runs"]] == list(WORKERS)
    for run in fleet["runs"]:
        check_run(run, MODELS, run["workers"])
        assert run["train_records"] < settings["records"]  # holdout records are not learnt
        assert run["ratio_to_one_model"] > 0
    check_run(fleet["one_model"], 1, 1)
    # The one model holds as many records as the whole fleet.
    assert fleet["one_model"]["train_records"] > 0
    assert set(fleet["speedup_over_one_worker"]) == {str(w) for w in WORKERS}


def test_the_scale_bench_trains_a_small_fleet_with_one_and_two_workers_on_sqlite() -> None:
    result = run_scale_bench(models=MODELS, min_records=150, max_records=400,
                             workers=WORKERS, sections=("fleet",))
    assert result["database"] == "sqlite"
    check_report(result)


def test_the_scale_bench_trains_a_small_fleet_with_one_and_two_workers_on_postgresql(
    postgres_url: str,
) -> None:
    result = run_scale_bench(models=MODELS, min_records=150, max_records=400,
                             workers=WORKERS, sections=("fleet",), postgres_url=postgres_url)
    assert result["database"] == "postgresql"
    check_report(result)


def test_the_fleet_models_are_seven_fields_and_16_8_hidden() -> None:
    spec = fleet_spec("station-0000")
    assert len(spec["features"]) == 7 and spec["hidden_layers"] == [16, 8]
