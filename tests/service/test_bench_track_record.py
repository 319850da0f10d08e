"""`keelson bench track-record` runs end to end on a small history (figures
are not checked: they are measured, not tested)."""

from __future__ import annotations

from service.tools.bench.track_record import run_track_record_bench


def test_the_track_record_bench_fills_a_year_of_days_and_times_the_answers() -> None:
    result = run_track_record_bench(outcomes=3000, repeats=5, cases=20_000)
    sqlite = result["sqlite"]
    # 3,000 outcomes over 365 days: one row per version and UTC day with outcomes.
    assert 366 <= sqlite["day_rows"] <= 368
    assert sqlite["record_outcomes_per_second"] > 0
    for answer in (*sqlite["summary_ms"].values(), sqlite["metrics_scrape_ms"]):
        assert 0 < answer["median"] <= answer["p95"]
    assert "postgresql" not in result and result["scored_cases"] == 20_000
