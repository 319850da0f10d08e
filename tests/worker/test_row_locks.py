"""Row locks on PostgreSQL: a version write never waits on the model row lock.

Inserting a row that references the model (a version) takes PostgreSQL's
``FOR KEY SHARE`` on the model row. Were the model locked ``FOR UPDATE``, a
retrain writing its version (holding its job and the trainer row) would wait
for an online checkpoint that holds the model row to promote its version,
while that checkpoint waits for the trainer row: PostgreSQL breaks the cycle
by failing one of them ("deadlock detected"), which failed retrain jobs under
load. The model row is locked ``FOR NO KEY UPDATE`` instead (PostgreSQL
manual, "Explicit Locking", row-level lock conflict table).
"""

from __future__ import annotations

import threading
from typing import Any

import pytest

from service.store.database import make_engine, make_sessionmaker
from service.usecases.common import find_model
from service.versions.promote import lock_model
from service.versions.writes import NewVersion, lock_trainer, write_retrain_version
from tests.worker.factories import claimed_retrain


@pytest.fixture
def writes(postgres_url: str):  # type: ignore[no-untyped-def]
    engine = make_engine(postgres_url)
    yield make_sessionmaker(engine, write=True)
    engine.dispose()


@pytest.mark.parametrize("how", ["lock_model", "find_model"])
def test_a_retrain_version_is_written_while_another_transaction_holds_the_model(
        writes: Any, how: str) -> None:
    model_id, job_id = claimed_retrain(writes)
    new = NewVersion(snapshot=b"w", origin="retrain", cursor=0, records_seen=0,
                     metrics={}, parent_id=None, job_id=job_id)
    outcome: dict[str, Any] = {}

    def retrain_writes_its_version() -> None:
        try:
            outcome["version"] = write_retrain_version(writes, job_id, "a", new, None).number
        except Exception as exc:  # reported by the assertion below
            outcome["error"] = exc

    writer = threading.Thread(target=retrain_writes_its_version)
    holder = writes()
    holder.begin()
    try:
        # What an online checkpoint that will promote its version does first.
        if how == "lock_model":
            lock_model(holder, model_id)
        else:
            find_model(holder, "pump-risk", lock=True)
        writer.start()
        writer.join(10)
        assert not writer.is_alive(), "the version insert waited on the model row lock"
        assert outcome == {"version": 1}
        lock_trainer(holder, model_id)  # the checkpoint goes on: no deadlock
        holder.commit()
    finally:
        if holder.in_transaction():
            holder.rollback()
        holder.close()
        if writer.is_alive() or writer.ident is not None:
            writer.join()
