"""Exactly once under concurrent ingestion (docs/architecture.md, invariant 1), PostgreSQL.

Sequence numbers come from one PostgreSQL sequence shared by all models, so
under concurrent ingestion a lower number can commit after a higher one. The
chosen mechanism: ingest locks the model's row before it takes numbers, so
one model's records commit in sequence order (service/usecases/records.py),
and the worker reads "after the cursor" (service/store/record_log.py). Here six
processes ingest into two models at once while a worker consumes; afterwards
each model's weights must equal, bit for bit, one pass of the engine over its
train records in sequence order: a skipped or a repeated record would change
them (common practice, no source).
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
from sqlalchemy import func, select

from engine import Learner
from service.store.database import Database
from service.store.tables import RecordRow
from tests.worker.helpers import (
    ROOT,
    assert_one_chain,
    assert_same_state,
    caught_up,
    database,
    model_row,
    new_model,
    numeric_spec,
    send,
    trainer,
    uninterrupted,
    wait_until,
    worker_thread,
)
from tests.worker.ingest_stream import FIELDS

FIRST = 100  # records per model sent before the writers start (the warm-up's)


def test_records_ingested_concurrently_are_each_applied_exactly_once(
    postgres_url: str, tmp_path: Path
) -> None:
    db = database(postgres_url)
    names = ["north", "south"]
    ids = [new_model(db, numeric_spec(name, FIELDS, hidden_layers=[8],
                                      training={"checkpoint_every": 300,
                                                "warmup_records": 64}))
           for name in names]
    # The warm-up's records first, so the network is made from its full count
    # however the writers' timing goes (a quiet stream would start it short).
    rng = np.random.default_rng(7)
    warmed = {}
    for name, model_id in zip(names, ids, strict=True):
        send(db, name, [{"key": f"first-{i}",
                         "features": dict(zip(FIELDS, map(float, row), strict=True)),
                         "label": bool(row[0] > 0)}
                        for i, row in enumerate(rng.normal(size=(FIRST, len(FIELDS))))])
        assert model_row(db, model_id).records_train >= 64
        warmed[model_id] = last_seq(db, model_id)
    gate = tmp_path / "second-half"
    with worker_thread(postgres_url, KEELSON_WORKER_CHUNK_RECORDS=25):
        writers = [
            subprocess.Popen([sys.executable, "-m", "tests.worker.ingest_stream", postgres_url,
                              names[k % 2], str(100 + k), "900", str(gate)], cwd=ROOT)
            for k in range(6)
        ]
        try:
            # The writers wait halfway: a version past the first records now
            # means the worker consumed while they were writing.
            wait_until(lambda: all(trainer(db, m).cursor > warmed[m] for m in ids),
                       timeout=120)
            assert all(writer.poll() is None for writer in writers)
        finally:
            gate.touch()
        for writer in writers:
            assert writer.wait(300) == 0
        wait_until(lambda: all(caught_up(db, model_id) for model_id in ids), timeout=120)
    for n, model_id in enumerate(ids):
        chain = assert_one_chain(db, model_id)
        model = model_row(db, model_id)
        assert model.records_train + model.records_holdout == FIRST + 2700
        with db.read() as session:  # each key its writer sent, once, and nothing else
            keys = list(session.scalars(select(RecordRow.key)
                                        .where(RecordRow.model_id == model_id)))
        assert len(keys) == len(set(keys)) == FIRST + 2700
        assert set(keys) == ({f"first-{i}" for i in range(FIRST)}
                             | {f"{100 + k}-{i}" for k in range(n, 6, 2) for i in range(900)})
        assert chain[-1].records_seen == model.records_train
        assert_same_state(Learner.from_bytes(chain[-1].snapshot), uninterrupted(db, model_id))
    db.engine.dispose()


def last_seq(db: Database, model_id: int) -> int:
    with db.read() as session:
        return int(session.scalar(select(func.max(RecordRow.seq))
                                  .where(RecordRow.model_id == model_id)))
