"""The replay benchmark runs end to end on a small record count (its figures
are measured by `keelson bench replay`, not checked here: timing on a shared
CI machine says nothing)."""

from __future__ import annotations

import pytest

from service.tools.bench.replay import run_replay_bench


def test_the_replay_benchmark_rebuilds_the_last_version_identical(
        monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("KEELSON_BENCH_POSTGRES_URL", raising=False)
    result = run_replay_bench(records=1500)
    figures = result["sqlite"]
    assert figures["identical"] is True
    assert figures["all_records"] == 1500 and 0 < figures["train_records"] < 1500
    assert figures["replay_records_per_s"] > 0 and figures["engine_learn_records_per_s"] > 0
    assert figures["ratio"] > 0 and figures["target_ratio"] == 0.8
    assert "skipped" in result["postgresql"]
