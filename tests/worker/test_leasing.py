"""Leases on trainers and jobs: one holder at a time, expiry hands rows on.

The properties are Keelson's design (docs/architecture.md, "Scale-out"); the
``FOR UPDATE SKIP LOCKED`` behaviour relied on is PostgreSQL's documented
locking clause (PostgreSQL 15 manual, SELECT, "The Locking Clause").
"""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import select, update

from service.store.database import make_engine, make_sessionmaker
from service.store.tables import JobRow, ModelRow, RecordRow, TrainerRow, utcnow
from service.worker.leasing import (
    MAX_JOB_ATTEMPTS,
    claim_job,
    claim_trainers,
    ensure_trainer_rows,
    release_trainers,
    renew_job,
    renew_trainers,
)
from tests.worker.factories import create_model


@pytest.fixture
def writes(database_url: str):  # type: ignore[no-untyped-def]
    engine = make_engine(database_url)
    yield make_sessionmaker(engine, write=True)
    engine.dispose()


def models(writes, count: int, records: int = 1) -> list[int]:  # type: ignore[no-untyped-def]
    """``count`` models, each with ``records`` records after its cursor (only
    a model with records to learn is leased)."""
    with writes() as session, session.begin():
        made = [create_model(session, f"m{i}").id for i in range(count)]
        for model_id in made:
            for _ in range(records):
                add_record(session, model_id)
        return made


def add_record(session, model_id: int) -> None:  # type: ignore[no-untyped-def]
    session.add(RecordRow(model_id=model_id, key=None, features={"x": 0.5}, label=True,
                          split="train"))
    session.flush()


def claim(writes, worker: str, limit: int = 10, lease: float = 30.0) -> list[int]:  # type: ignore[no-untyped-def]
    with writes() as session, session.begin():
        return claim_trainers(session, worker, lease, limit)


def test_each_trainer_is_leased_to_one_worker_only(writes) -> None:  # type: ignore[no-untyped-def]
    ids = models(writes, 3)
    first = claim(writes, "a", limit=2)
    second = claim(writes, "b")
    assert sorted(first + second) == ids and not set(first) & set(second)
    assert claim(writes, "c") == []


def test_an_expired_lease_passes_to_another_worker(writes) -> None:  # type: ignore[no-untyped-def]
    (model_id,) = models(writes, 1)
    assert claim(writes, "a", lease=30) == [model_id]
    assert claim(writes, "b") == []
    with writes() as session, session.begin():
        past = utcnow() - dt.timedelta(seconds=1)
        session.execute(update(TrainerRow).values(lease_expires_at=past))
    assert claim(writes, "b") == [model_id]
    with writes() as session, session.begin():
        assert renew_trainers(session, "a", [model_id], 30) == {}
        assert renew_trainers(session, "b", [model_id], 30) == {model_id: None}


def test_a_stopped_lineage_is_not_leased(writes) -> None:  # type: ignore[no-untyped-def]
    (model_id,) = models(writes, 1)
    with writes() as session, session.begin():
        session.execute(update(TrainerRow).values(error="NonFiniteError: loss is inf"))
    assert claim(writes, "a") == []


def test_released_leases_are_free_at_once_and_excluded_ones_are_not_reclaimed(writes) -> None:  # type: ignore[no-untyped-def]
    ids = models(writes, 2)
    assert claim(writes, "a") == ids
    with writes() as session, session.begin():
        assert claim_trainers(session, "a", 30, 10, exclude=ids) == []
        release_trainers(session, "a", ids[:1])
    assert claim(writes, "b") == ids[:1]


def test_missing_trainer_rows_are_created(writes) -> None:  # type: ignore[no-untyped-def]
    with writes() as session, session.begin():
        model = ModelRow(name="bare", spec={"task": "binary"}, records_train=0, records_holdout=0)
        session.add(model)
    with writes() as session, session.begin():
        ensure_trainer_rows(session)
        ensure_trainer_rows(session)
    with writes() as session:
        assert session.get(TrainerRow, model.id) is not None


def add_job(writes, model_id: int) -> int:  # type: ignore[no-untyped-def]
    with writes() as session, session.begin():
        job = JobRow(model_id=model_id, kind="retrain", status="queued", params={})
        session.add(job)
        session.flush()
        return job.id


def test_a_job_is_claimed_once_and_again_after_its_worker_vanished(writes) -> None:  # type: ignore[no-untyped-def]
    (model_id,) = models(writes, 1)
    job_id = add_job(writes, model_id)
    with writes() as session, session.begin():
        job = claim_job(session, "a", 30)
        assert job is not None and (job.id, job.status, job.attempts) == (job_id, "running", 1)
    with writes() as session, session.begin():
        assert claim_job(session, "b", 30) is None
        assert renew_job(session, "a", job_id, 30)
    with writes() as session, session.begin():
        session.execute(update(JobRow).values(lease_expires_at=utcnow() - dt.timedelta(seconds=1)))
    with writes() as session, session.begin():
        job = claim_job(session, "b", 30)
        assert job is not None and (job.leased_by, job.attempts) == ("b", 2)
        assert not renew_job(session, "a", job_id, 30)


def test_a_job_that_keeps_losing_its_worker_is_failed(writes) -> None:  # type: ignore[no-untyped-def]
    (model_id,) = models(writes, 1)
    job_id = add_job(writes, model_id)
    past = utcnow() - dt.timedelta(seconds=1)
    with writes() as session, session.begin():
        session.execute(update(JobRow).values(status="running", attempts=MAX_JOB_ATTEMPTS,
                                              leased_by="gone", lease_expires_at=past))
    with writes() as session, session.begin():
        assert claim_job(session, "b", 30) is None
    with writes() as session:
        job = session.execute(select(JobRow).where(JobRow.id == job_id)).scalar_one()
        assert job.status == "failed" and "not retried" in (job.error or "")


def test_postgres_claims_skip_rows_another_transaction_holds(postgres_url: str) -> None:
    engine = make_engine(postgres_url)
    writes = make_sessionmaker(engine, write=True)
    ids = models(writes, 2)
    with writes() as holding, holding.begin():
        first = claim_trainers(holding, "a", 30, 1)
        # "a" has not committed yet: "b" neither waits for it nor gets its row.
        second = claim(writes, "b", limit=10)
        assert first == ids[:1] and second == ids[1:]
    engine.dispose()


def test_a_backed_off_trainer_is_not_leased_before_its_retry_time(writes) -> None:  # type: ignore[no-untyped-def]
    """The back-off is kept in the database, so it holds for every worker and
    across restarts: a model whose retry time is still ahead is left alone."""
    from service.worker.faults import record_fault

    first, second = models(writes, 2)
    assert claim(writes, "a") == [first, second]
    fault = record_fault(writes, first, "a", "the model's stored spec cannot be read", 60, 300)
    assert fault is not None and (fault.count, fault.delay) == (1, 60)
    assert claim(writes, "b") == []  # "a" still holds the second; the first waits
    with writes() as session, session.begin():
        row = session.get(TrainerRow, first)
        assert row is not None and row.leased_by is None and row.faults == 1
        assert row.retry_at is not None and row.error is None
        row.retry_at = utcnow() - dt.timedelta(seconds=1)
    assert claim(writes, "b") == [first]
    # A fault recorded by a worker that no longer holds the model changes nothing.
    assert record_fault(writes, first, "a", "late", 60, 300) is None
    # Nor one from a try that started on a head since replaced (a promotion).
    assert record_fault(writes, first, "b", "stale", 60, 300, head_id=12345) is None
    with writes() as session:
        row = session.get(TrainerRow, first)
        assert row is not None and row.leased_by == "b" and row.fault is not None
        assert row.fault != "stale"


def test_the_back_off_doubles_from_the_first_wait_up_to_the_largest() -> None:
    from service.worker.faults import back_off_seconds

    assert [back_off_seconds(n, 1.0, 300.0) for n in range(1, 11)] == [
        1, 2, 4, 8, 16, 32, 64, 128, 256, 300]
    assert back_off_seconds(10_000, 1.0, 300.0) == 300.0  # no overflow however many


def test_only_models_with_records_after_their_cursor_are_leased(writes) -> None:  # type: ignore[no-untyped-def]
    """A caught-up model is let go by its worker (KEELSON_WORKER_RELEASE_SECONDS)
    and must not be taken back, loaded, for nothing: it is leased again once a
    record comes after its cursor."""
    (empty,) = models(writes, 1, records=0)
    assert claim(writes, "a") == []
    with writes() as session, session.begin():
        add_record(session, empty)
    assert claim(writes, "a") == [empty]
    with writes() as session, session.begin():
        release_trainers(session, "a", [empty])
        top = session.scalar(select(RecordRow.seq).where(RecordRow.model_id == empty))
        session.execute(update(TrainerRow).values(cursor=top))  # every record applied
    assert claim(writes, "a") == []
    with writes() as session, session.begin():
        add_record(session, empty)
    assert claim(writes, "b") == [empty]
