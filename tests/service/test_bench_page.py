"""`keelson bench page` runs end to end on a small history (figures are not
checked: they are measured, not tested)."""

from __future__ import annotations

from service.tools.bench.page import PAGES, run_page_bench


def test_the_page_bench_stores_the_history_and_times_every_page() -> None:
    result = run_page_bench(records=2000, versions=40, repeats=5)
    assert result["records"] == 2000 and result["versions"] == 40
    assert set(result["sqlite"]) == set(PAGES)
    for page in result["sqlite"].values():
        assert 0 < page["median_ms"] <= page["p95_ms"] and page["bytes"] > 0
    assert 0 < result["assets_bytes"] <= 250_000  # issue 11: JS and CSS within 250 KB
    assert "postgresql" not in result
