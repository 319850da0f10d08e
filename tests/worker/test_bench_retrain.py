"""The retrain benchmark runs end to end on a small record count: the job runs in
its own process and its weights equal the engine's in memory (its speed and
memory figures are measured by `keelson bench retrain`, not checked here)."""

from __future__ import annotations

import os

import pytest

from service.tools.bench.retrain import run_retrain_bench


def check(figures: dict, records: int) -> None:
    assert figures["job"] == {"status": "succeeded", "error": None, "epochs": 2}
    assert 0 < figures["train_records"] < records
    assert figures["engine_in_memory"]["same_weights_as_the_job"] is True
    assert figures["worker"]["peak_rss_mib"] > 0 and figures["ratio"] > 0
    assert figures["decode"]["sample_records"] == figures["train_records"]


def test_the_retrain_benchmark_on_sqlite() -> None:
    result = run_retrain_bench(records=3000, fields=5, epochs=2)
    check(result["sqlite"], 3000)
    assert "skipped" in result["postgresql"]


@pytest.mark.skipif(not os.environ.get("KEELSON_TEST_DATABASE_URL", "").startswith("postgresql"),
                    reason="KEELSON_TEST_DATABASE_URL is not a PostgreSQL server")
def test_the_retrain_benchmark_on_postgresql() -> None:
    url = os.environ["KEELSON_TEST_DATABASE_URL"]
    result = run_retrain_bench(records=3000, fields=5, epochs=2, postgres_url=url, sqlite=False)
    check(result["postgresql"], 3000)
