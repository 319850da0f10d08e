"""A `keelson forget` killed with SIGKILL inside its transaction leaves
nothing changed; run again, it forgets everything once.

A test-only trigger stalls the delete of every record beyond a point
(tests/worker/hold.py, ``on="DELETE"``), so the kill lands after the forget
has marked the versions, taken out the outcomes and deleted the cases and
the records below that point, every time. Common practice, no source.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import select

from service.store.database import Database
from service.store.tables import Base, ModelEventRow, RecordRow, VersionRow
from service.versions.writes import NewVersion, insert_version
from tests.worker.helpers import ROOT, database, new_model, numeric_spec, send, wait_until
from tests.worker.hold import end_orphans, hold, inside_hold, install_hold, release

pytestmark = pytest.mark.slow
RECORDS = 400


def dump(db: Database) -> dict[str, list[Any]]:
    """Every row of every table of the store, in primary-key order."""
    with db.read() as session:
        return {table.name: [tuple(row) for row in session.execute(
            select(table).order_by(*table.primary_key.columns))]
            for table in Base.metadata.sorted_tables}


def forget_command(url: str, keys_file: Path) -> subprocess.Popen[bytes]:
    env = {**os.environ, "KEELSON_DATABASE_URL": url, "PYTHONPATH": str(ROOT)}
    return subprocess.Popen(
        [sys.executable, "-m", "service", "forget", "north-well", "--keys-file",
         str(keys_file), "--reason", "withdrawn consent"],
        cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT)


def test_a_forget_killed_inside_its_transaction_changes_nothing(
        database_url: str, tmp_path: Path) -> None:
    db = database(database_url)
    model_id = new_model(db, numeric_spec("north-well", ["flow"]))
    send(db, "north-well", [{"key": f"w-{i}", "features": {"flow": float(i % 13)},
                             "label": i % 2 == 0} for i in range(RECORDS)])
    with db.read() as session:
        seqs = list(session.scalars(select(RecordRow.seq).order_by(RecordRow.seq)))
        splits = {key: split for key, split in session.execute(
            select(RecordRow.key, RecordRow.split))}
    with db.write() as session, session.begin():
        insert_version(session, model_id, NewVersion(
            snapshot=b"-", origin="online", cursor=seqs[-1], records_seen=RECORDS,
            metrics={}, parent_id=None))
    keys = tmp_path / "keys.txt"
    keys.write_text("".join(f"w-{i}\n" for i in range(0, RECORDS, 2)), encoding="utf-8")
    install_hold(db, "records", "seq", on="DELETE")
    before = dump(db)
    hold(db, beyond=seqs[RECORDS // 2])
    process = forget_command(database_url, keys)
    try:
        wait_until(lambda: inside_hold(db) or process.poll() is not None, timeout=120)
        assert process.poll() is None, process.communicate()[0].decode()[-2000:]
    finally:
        process.send_signal(signal.SIGKILL)
        process.wait(30)
    end_orphans(db)
    release(db)
    assert dump(db) == before  # all or nothing: nothing

    again = forget_command(database_url, keys)
    output = again.communicate(timeout=120)[0].decode()
    assert again.returncode == 0, output
    assert "200 forgotten" in output
    with db.read() as session:
        left = list(session.scalars(select(RecordRow.key).order_by(RecordRow.seq)))
        marked = session.scalars(select(VersionRow.forgotten_records)).one()
        events = list(session.scalars(select(ModelEventRow.kind).order_by(ModelEventRow.id)))
    assert left == [f"w-{i}" for i in range(1, RECORDS, 2)]
    # The version read every record: it learned each forgotten train record.
    assert marked == sum(splits[f"w-{i}"] == "train" for i in range(0, RECORDS, 2)) > 0
    assert events.count("records_forgotten") == 1
    db.engine.dispose()
