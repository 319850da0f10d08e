"""`keelson outcomes import`: outcomes from a CSV file in batches, through the
HTTP API's own checks; a batch with an unknown key stores none of its rows,
and the line is named."""

from __future__ import annotations

from pathlib import Path

from click.testing import CliRunner
from sqlalchemy import create_engine, text

from service.tools.cli import cli
from service.web.extensions import get_database
from tests.service.conftest import build_app
from tests.service.helpers import ApiClient
from tests.service.outcome_helpers import scored_pumps


def outcomes_import(database_url: str, *args: str) -> tuple[int, str]:
    result = CliRunner().invoke(cli, ["outcomes", "import", *args],
                                env={"KEELSON_DATABASE_URL": database_url}, prog_name="keelson")
    return result.exit_code, result.output


def stored(database_url: str) -> tuple[set[str], set[str]]:
    """(record keys, keys of cases with an outcome)."""
    engine = create_engine(database_url)
    try:
        with engine.connect() as connection:
            return (set(connection.execute(text("SELECT key FROM records")).scalars()),
                    set(connection.execute(text(
                        "SELECT key FROM scored_cases WHERE outcome IS NOT NULL")).scalars()))
    finally:
        engine.dispose()


def test_outcomes_are_imported_in_batches_and_a_bad_batch_stores_nothing(
        database_url: str, tmp_path: Path) -> None:
    app = build_app(database_url)
    try:
        scored_pumps(ApiClient(app), 5)
    finally:
        get_database(app).engine.dispose()
    path = tmp_path / "outcomes.csv"
    # Lines 2-3, 4-5 and 6 are the batches; line 5 names a case never scored.
    path.write_text("key,label\nst-0,ok\nst-1,failed\nst-2,ok\nst-9,ok\nst-4,failed\n")
    status, output = outcomes_import(database_url, "pump-risk", str(path), "--batch-size", "2")
    assert status == 1, output
    assert "5 rows in 3 batches; 3 stored, 0 duplicates, 2 not stored" in output
    assert "rejected lines 4-5" in output and "line 5 key: No case was scored" in output
    keys = {"st-0", "st-1", "st-4"}
    assert stored(database_url) == (keys, keys)
    path.write_text("key,label\nst-0,ok\nst-2,ok\n")
    status, output = outcomes_import(database_url, "pump-risk", str(path))
    assert status == 0, output
    assert "2 rows in 1 batches; 1 stored, 1 duplicates, 0 not stored" in output


def test_a_header_that_is_not_an_outcome_stops_before_anything_is_sent(
        sqlite_url: str, tmp_path: Path) -> None:
    app = build_app(sqlite_url)
    try:
        scored_pumps(ApiClient(app), 1)
    finally:
        get_database(app).engine.dispose()
    path = tmp_path / "outcomes.csv"
    path.write_text("key,failed_within_30d\nst-0,ok\n")
    status, output = outcomes_import(sqlite_url, "pump-risk", str(path))
    assert status == 1
    assert "the header does not match model 'pump-risk'" in output
    assert "failed_within_30d: Unknown column" in output and "label: Missing column" in output
    assert stored(sqlite_url) == (set(), set())
