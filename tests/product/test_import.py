"""`keelson import`: batches, a progress bar, and rejected batches that store nothing.

Data: Fisher's Iris (Annals of Eugenics 7, 1936), the copy shipped with
scikit-learn (150 rows, 4 measurements in cm, 3 species). CSV per RFC 4180.
"""

from __future__ import annotations

import csv
from pathlib import Path

import pytest
from click.testing import CliRunner
from sklearn.datasets import load_iris
from sqlalchemy import create_engine, text

from service.tools.cli import cli
from service.web.app import create_app

ADMIN = "test-admin-token"
FEATURES = ["sepal_length", "sepal_width", "petal_length", "petal_width"]
SPECIES = ["setosa", "versicolor", "virginica"]


def _create_iris_model(database_url: str) -> None:
    client = create_app({"KEELSON_DATABASE_URL": database_url,
                         "KEELSON_ADMIN_TOKEN": ADMIN}).test_client()
    spec = {"name": "iris", "task": "multiclass", "target": "species", "classes": SPECIES,
            "features": [{"name": n, "type": "numeric", "min": 0, "max": 30, "unit": "cm"}
                         for n in FEATURES]}
    answer = client.post("/v1/models", json=spec, headers={"Authorization": f"Bearer {ADMIN}"})
    assert answer.status_code == 201, answer.get_json()


def _iris_rows() -> list[list[str]]:
    iris = load_iris()
    assert iris.data.shape == (150, 4)  # Fisher (1936): 150 flowers, 4 measurements
    return [[f"flower-{i:03d}", *(f"{v:.1f}" for v in row), SPECIES[int(t)]]
            for i, (row, t) in enumerate(zip(iris.data, iris.target, strict=True))]


def _write(path: Path, rows: list[list[str]]) -> Path:
    with path.open("w", newline="") as out:
        writer = csv.writer(out)
        writer.writerow(["key", *FEATURES, "species"])
        writer.writerows(rows)
    return path


def _stored_keys(database_url: str) -> set[str]:
    engine = create_engine(database_url)
    try:
        with engine.connect() as connection:
            return set(connection.execute(text("SELECT key FROM records")).scalars())
    finally:
        engine.dispose()


def _import(database_url: str, *args: str) -> tuple[int, str]:
    result = CliRunner().invoke(cli, ["import", *args],
                                env={"KEELSON_DATABASE_URL": database_url}, prog_name="keelson")
    return result.exit_code, result.output


def test_a_clean_file_is_stored_whole_and_a_second_import_only_finds_duplicates(
        database_url: str, tmp_path: Path) -> None:
    _create_iris_model(database_url)
    path = _write(tmp_path / "iris.csv", _iris_rows())
    status, output = _import(database_url, "iris", str(path), "--batch-size", "40")
    assert status == 0, output
    assert "150 rows in 4 batches; 150 stored, 0 duplicates, 0 not stored" in output
    assert len(_stored_keys(database_url)) == 150
    status, output = _import(database_url, "iris", str(path))
    assert status == 0
    assert "150 rows in 1 batches; 0 stored, 150 duplicates" in output


def test_bad_rows_reject_their_whole_batch_and_are_named_by_line(
        database_url: str, tmp_path: Path) -> None:
    _create_iris_model(database_url)
    rows = _iris_rows()
    rows[57][1] = "five"         # a word in a number: file line 59 (header is line 1)
    rows[61][5] = "tulip"        # an unknown class: file line 63
    rows[130][3] = "nan"         # not a finite number: file line 132
    path = _write(tmp_path / "iris-bad.csv", rows)
    status, output = _import(database_url, "iris", str(path), "--batch-size", "50")
    assert status == 1
    assert "150 rows in 3 batches; 50 stored, 0 duplicates, 100 not stored " \
           "(2 batches rejected)" in output
    assert "rejected lines 52-101 (50 rows, none stored)" in output
    assert "rejected lines 102-151 (50 rows, none stored)" in output
    assert "line 59 features.sepal_length" in output
    assert "line 63 label" in output
    assert "line 132 features.petal_length" in output
    # Only the clean batch (rows 0-49) is stored; nothing of a rejected batch.
    assert _stored_keys(database_url) == {f"flower-{i:03d}" for i in range(50)}


def test_a_header_that_does_not_match_the_model_stops_before_sending_anything(
        sqlite_url: str, tmp_path: Path) -> None:
    _create_iris_model(sqlite_url)
    path = tmp_path / "wrong.csv"
    path.write_text("key,sepal_length,colour,species\nx,5.1,red,setosa\n")
    status, output = _import(sqlite_url, "iris", str(path))
    assert status == 1
    assert "the header does not match model 'iris'" in output
    assert "colour" in output and "petal_width" in output
    assert _stored_keys(sqlite_url) == set()


@pytest.mark.parametrize("model", ["no-such-model", "Bad Name"])
def test_an_unknown_model_is_a_clear_failure(sqlite_url: str, tmp_path: Path,
                                             model: str) -> None:
    path = _write(tmp_path / "iris.csv", _iris_rows()[:3])
    status, output = _import(sqlite_url, model, str(path))
    assert status == 1
    assert f"There is no model named {model!r}" in output


def test_broken_csv_stops_with_the_line_and_keeps_earlier_batches(
        sqlite_url: str, tmp_path: Path) -> None:
    _create_iris_model(sqlite_url)
    path = _write(tmp_path / "iris.csv", _iris_rows()[:20])
    with path.open("a") as out:
        out.write('flower-x,5.1,3.5,1.4,0.2,"set"osa\n')  # a stray quote (RFC 4180 section 2)
    status, output = _import(sqlite_url, "iris", str(path), "--batch-size", "10")
    assert status == 1
    assert "broken CSV at line 22" in output
    assert len(_stored_keys(sqlite_url)) == 20


def test_a_bulk_import_leaves_postgresql_with_fresh_planner_statistics(
    postgres_url: str, tmp_path: Path
) -> None:
    """After 10,000+ records the records table is analysed at once, so the
    worker's reads after the cursor are not planned for an empty table."""
    _create_iris_model(postgres_url)
    rows = [[f"flower-{k}-{row[0]}", *row[1:]] for k in range(70) for row in _iris_rows()]
    status, output = _import(postgres_url, "iris", str(_write(tmp_path / "many.csv", rows)))
    assert status == 0, output
    engine = create_engine(postgres_url)
    try:
        with engine.connect() as connection:
            analysed = connection.execute(text(
                "SELECT last_analyze FROM pg_stat_user_tables WHERE relname = 'records'"
            )).scalar_one()
            stored = connection.execute(text("SELECT count(*) FROM records")).scalar_one()
    finally:
        engine.dispose()
    assert stored == 70 * 150
    assert analysed is not None
