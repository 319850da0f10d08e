"""`keelson bench storage` runs end to end on a small record count: it
measures the tables, prunes with the default rule and scales as documented
(its figures are the command's, not checked here)."""

from __future__ import annotations

from service.config import setting
from service.tools.bench.storage import run_storage_bench


def test_the_storage_benchmark_measures_and_prunes_on_a_small_stream() -> None:
    result = run_storage_bench(records=20_000)
    figures = result["sqlite"]
    keep_last = setting("KEELSON_SNAPSHOT_KEEP_LAST").default
    assert figures["records"] == 20_000 and figures["versions"] > keep_last
    measured = figures["measured_bytes"]
    assert measured["records"] > 0 and 0 < measured["snapshots"] < measured["versions"]
    kept = figures["after_retention"]
    # Retention kept the newest N, the ever-active ones and the head; the rest went.
    assert keep_last <= kept["versions_with_snapshot"] <= (
        keep_last + 1 + figures["versions_ever_active"])
    assert kept["versions_with_snapshot"] < figures["versions"]
    assert 0 < kept["snapshot_bytes"] < measured["snapshots"]
    per_million = figures["mb_per_million_records"]
    assert per_million["snapshots_kept_forever"] == round(
        measured["snapshots"] * 1_000_000 / 20_000 / 1_000_000, 1)
