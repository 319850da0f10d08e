"""Version writes: atomic with the trainer's cursor and head, fenced against
workers that no longer own the lineage (docs/architecture.md, invariants 2 and 3)."""

from __future__ import annotations

import pytest
from sqlalchemy import select

from service.store.database import make_engine, make_sessionmaker
from service.store.tables import JobRow, ModelRow, RecordRow, TrainerRow, VersionRow
from service.versions.decide import Promotion
from service.versions.writes import (
    Fenced,
    NewVersion,
    advance_cursor,
    stop_lineage,
    write_online_version,
    write_retrain_version,
)
from service.worker.leasing import claim_trainers
from tests.worker.factories import claimed_retrain, create_model


@pytest.fixture
def writes(database_url: str):  # type: ignore[no-untyped-def]
    engine = make_engine(database_url)
    yield make_sessionmaker(engine, write=True)
    engine.dispose()


def leased_model(writes, worker: str = "a") -> int:  # type: ignore[no-untyped-def]
    with writes() as session, session.begin():
        model_id = create_model(session).id
        # A record to learn: only such a model is leased.
        session.add(RecordRow(model_id=model_id, key=None, features={"x": 0.5}, label=True,
                              split="train"))
        session.flush()
        assert claim_trainers(session, worker, 30, 1) == [model_id]
    return model_id


def online(cursor: int, parent: int | None) -> NewVersion:
    return NewVersion(snapshot=b"weights", origin="online", cursor=cursor, records_seen=cursor,
                      metrics={"holdout": {"log_loss": 0.5}}, parent_id=parent)


def trainer_state(writes, model_id: int) -> tuple[int, int | None, str | None]:  # type: ignore[no-untyped-def]
    with writes() as session:
        trainer = session.get(TrainerRow, model_id)
        assert trainer is not None
        return trainer.cursor, trainer.head_version_id, trainer.error


def test_a_version_moves_the_cursor_and_head_and_numbers_count_up(writes) -> None:  # type: ignore[no-untyped-def]
    model_id = leased_model(writes)
    first = write_online_version(writes, model_id, "a", None, online(10, None), Promotion(None))
    second = write_online_version(writes, model_id, "a", first.id, online(20, first.id), None)
    assert (first.number, second.number) == (1, 2)
    assert (first.status, second.status) == ("active", "candidate")
    assert trainer_state(writes, model_id) == (20, second.id, None)
    with writes() as session:
        assert session.get(ModelRow, model_id).active_version_id == first.id  # type: ignore[union-attr]


def test_a_worker_without_the_lease_writes_nothing(writes) -> None:  # type: ignore[no-untyped-def]
    model_id = leased_model(writes, "a")
    with pytest.raises(Fenced):
        write_online_version(writes, model_id, "b", None, online(10, None), None)
    with pytest.raises(Fenced):
        advance_cursor(writes, model_id, "b", None, 10)
    assert trainer_state(writes, model_id) == (0, None, None)
    with writes() as session:
        assert session.execute(select(VersionRow)).first() is None


def test_a_worker_whose_head_moved_writes_nothing(writes) -> None:  # type: ignore[no-untyped-def]
    model_id = leased_model(writes, "a")
    first = write_online_version(writes, model_id, "a", None, online(10, None), None)
    with pytest.raises(Fenced):  # still believes there is no head
        write_online_version(writes, model_id, "a", None, online(12, None), None)
    assert trainer_state(writes, model_id) == (10, first.id, None)


def test_a_promotion_decided_against_a_replaced_active_version_is_not_applied(writes) -> None:  # type: ignore[no-untyped-def]
    model_id = leased_model(writes)
    first = write_online_version(writes, model_id, "a", None, online(10, None), Promotion(None))
    # Decided while "no version was active"; meanwhile first became active.
    second = write_online_version(writes, model_id, "a", first.id, online(20, first.id),
                                  Promotion(None))
    assert second.status == "candidate"


def test_stopping_a_lineage_records_the_error_and_frees_the_lease(writes) -> None:  # type: ignore[no-untyped-def]
    model_id = leased_model(writes)
    stop_lineage(writes, model_id, "a", None, "NonFiniteError at record 7")
    with writes() as session:
        trainer = session.get(TrainerRow, model_id)
        assert trainer is not None
        assert (trainer.error, trainer.leased_by) == ("NonFiniteError at record 7", None)


def test_a_retrain_version_completes_its_job_in_the_same_transaction(writes) -> None:  # type: ignore[no-untyped-def]
    model_id, job_id = claimed_retrain(writes)
    new = NewVersion(snapshot=b"w", origin="retrain", cursor=30, records_seen=24,
                     metrics={}, parent_id=None, job_id=job_id)
    with pytest.raises(Fenced):
        write_retrain_version(writes, job_id, "b", new, None)
    version = write_retrain_version(writes, job_id, "a", new, Promotion(None))
    with writes() as session:
        job = session.get(JobRow, job_id)
        assert job is not None and (job.status, job.version_id) == ("succeeded", version.id)
    # A promoted retrain becomes the head of the online lineage.
    assert trainer_state(writes, model_id) == (30, version.id, None)
