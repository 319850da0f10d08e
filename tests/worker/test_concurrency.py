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

from engine import Learner
from tests.worker.helpers import (
    ROOT,
    assert_one_chain,
    assert_same_state,
    caught_up,
    database,
    model_row,
    new_model,
    numeric_spec,
    uninterrupted,
    versions,
    wait_until,
    worker_thread,
)
from tests.worker.ingest_stream import FIELDS


def test_records_ingested_concurrently_are_each_applied_exactly_once(
    postgres_url: str, tmp_path: Path
) -> None:
    db = database(postgres_url)
    names = ["north", "south"]
    ids = [new_model(db, numeric_spec(name, FIELDS, hidden_layers=[8],
                                      training={"checkpoint_every": 300,
                                                "warmup_records": 64}))
           for name in names]
    # A long idle time: warm-up waits for its full count, whatever the timing.
    with worker_thread(postgres_url, KEELSON_WORKER_IDLE_SECONDS=5.0,
                       KEELSON_WORKER_CHUNK_RECORDS=25):
        writers = [
            subprocess.Popen([sys.executable, "-m", "tests.worker.ingest_stream", postgres_url,
                              names[k % 2], str(100 + k), "900"], cwd=ROOT)
            for k in range(6)
        ]
        for writer in writers:
            assert writer.wait(60) == 0
        # The worker was consuming while the writers wrote.
        assert any(versions(db, model_id) for model_id in ids)
        wait_until(lambda: all(caught_up(db, model_id) for model_id in ids), timeout=40)
    for model_id in ids:
        chain = assert_one_chain(db, model_id)
        model = model_row(db, model_id)
        assert model.records_train + model.records_holdout == 2700
        assert chain[-1].records_seen == model.records_train
        assert_same_state(Learner.from_bytes(chain[-1].snapshot), uninterrupted(db, model_id))
    db.engine.dispose()

