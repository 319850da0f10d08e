"""A delete job's batches (service/worker/deletion.py): records go oldest
first, exactly ``size`` per batch, as one range of seq; on SQLite the batch
size follows how long each batch held the write lock (halved above the
target, grown back below half of it, within its bounds).

Our own rule; no outside source."""

from __future__ import annotations

from sqlalchemy import insert, select

from service.store.tables import ModelRow, RecordRow
from service.worker import deletion
from tests.worker.factories import create_model
from tests.worker.helpers import database


def test_records_go_oldest_first_a_batch_at_a_time(database_url: str) -> None:
    db = database(database_url)
    try:
        with db.write() as session:
            doomed = create_model(session, "pump-old").id
            other = create_model(session, "pump-new").id
            session.commit()
        rows = [{"model_id": model, "key": None, "features": {"x": float(i)}, "label": True,
                 "split": "train"} for i in range(7) for model in (doomed, other)]
        with db.write() as session:
            session.execute(insert(RecordRow), rows)
            session.commit()

        def left(model: int) -> list[float]:
            with db.read() as session:
                return [f["x"] for f in session.scalars(select(RecordRow.features).where(
                    RecordRow.model_id == model).order_by(RecordRow.seq))]

        with db.read() as session:
            seqs = list(session.scalars(select(RecordRow.seq).where(
                RecordRow.model_id == doomed).order_by(RecordRow.seq)))
        count, after = deletion._delete_records(db.read, db.write, doomed, 3, 0)
        assert (count, after) == (3, seqs[2])
        assert left(doomed) == [3.0, 4.0, 5.0, 6.0]
        count, after = deletion._delete_records(db.read, db.write, doomed, 3, after)
        assert (count, after) == (3, seqs[5])
        count, after = deletion._delete_records(db.read, db.write, doomed, 3, after)
        assert (count, after) == (1, seqs[5])  # the rest: fewer than a batch
        assert deletion._delete_records(db.read, db.write, doomed, 3, after) == (0, seqs[5])
        assert left(doomed) == []
        # A job started again (another worker) begins after 0: nothing is left.
        assert deletion._delete_records(db.read, db.write, doomed, 3, 0) == (0, 0)
        assert left(other) == [float(i) for i in range(7)]
        with db.read() as session:
            assert session.scalar(select(ModelRow.name).where(ModelRow.id == other)) == "pump-new"
    finally:
        db.engine.dispose()


def test_batch_size_follows_the_hold_time_within_its_bounds() -> None:
    target = deletion.HOLD_TARGET_SECONDS
    assert deletion._next_size(2000, 2000, target * 1.5) == 1000
    floor = deletion.MIN_BATCH
    assert deletion._next_size(floor + 10, 2000, target * 3) == floor  # never below the floor
    assert deletion._next_size(1000, 2000, target * 0.4) == 2000
    assert deletion._next_size(1500, 2000, target * 0.1) == 2000  # never above the setting
    assert deletion._next_size(1000, 2000, target * 0.75) == 1000  # in between: kept
