"""Record labels are stored exactly as sent, on both databases.

SQLite gives a column declared JSON NUMERIC affinity and converts a bare
number to a REAL with its own text-to-double conversion, which is not
correctly rounded for every value (SQLite documentation, "Datatypes In
SQLite", 3.1). The value below is one it gets wrong (found by the property
test in tests/reliability/test_record_properties.py); the expected value is
what Python's correctly rounded parser reads from the same text (IEEE 754).
"""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

from sqlalchemy import create_engine, select, text

from service.store.schema import upgrade_database
from service.store.tables import RecordRow

SENT = "4.041736865667259e-301"


def test_sqlites_own_conversion_is_the_reason() -> None:
    # The fact the storage works around: through NUMERIC affinity the text
    # comes back one unit in the last place away from Python's reading.
    connection = sqlite3.connect(":memory:")
    connection.execute("CREATE TABLE t (label JSON)")
    connection.execute("INSERT INTO t VALUES (?)", (SENT,))
    assert connection.execute("SELECT label FROM t").fetchone()[0] != float(SENT)


def test_a_regression_label_reads_back_bit_for_bit(database_url: str) -> None:
    engine = create_engine(database_url)
    with engine.begin() as connection:
        connection.execute(text(
            "INSERT INTO models (name, spec, records_train, records_holdout, created_at) "
            "VALUES ('m', '{}', 0, 0, CURRENT_TIMESTAMP)"))
        model_id = connection.execute(text("SELECT id FROM models")).scalar_one()
        connection.execute(text(
            "INSERT INTO records (seq, model_id, features, label, split, received_at) "
            "VALUES (1, :model, '{}', :label, 'train', CURRENT_TIMESTAMP)"),
            {"model": model_id, "label": SENT})
    with engine.connect() as connection:
        label = connection.execute(select(RecordRow.label)).scalar_one()
    engine.dispose()
    assert label == float(SENT) and type(label) is float


def test_the_migration_rewrites_labels_sqlite_had_converted(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'old.db'}"
    upgrade_database(url, "0001")
    connection = sqlite3.connect(tmp_path / "old.db")
    connection.execute("INSERT INTO models (id, name, spec, records_train, records_holdout, "
                       "created_at) VALUES (1, 'm', '{}', 0, 0, CURRENT_TIMESTAMP)")
    labels = [SENT, "0.1", "2.5e+300", "7", '"failed"', "true"]
    connection.executemany(
        "INSERT INTO records (seq, model_id, features, label, split, received_at) "
        "VALUES (?, 1, '{}', ?, 'train', CURRENT_TIMESTAMP)", enumerate(labels, 1))
    connection.commit()
    kept = [row[0] for row in connection.execute("SELECT label FROM records ORDER BY seq")]
    connection.close()
    upgrade_database(url)
    connection = sqlite3.connect(tmp_path / "old.db")
    rows = connection.execute("SELECT label, typeof(label) FROM records ORDER BY seq").fetchall()
    connection.close()
    assert {kind for _, kind in rows} == {"text"}
    # Every value SQLite kept before is read back as that same value.
    assert [json.loads(value) for value, _ in rows] == [
        value if not isinstance(value, str) else json.loads(value) for value in kept]
