"""Helpers for worker tests: models and records through the service's own use
cases, a worker on a thread, and waiting for the database to say something."""

from __future__ import annotations

import contextlib
import os
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

from sqlalchemy import select

from engine import Learner
from service.store.database import Database, make_engine, make_sessionmaker
from service.store.tables import ModelRow, RecordRow, TrainerRow, VersionRow
from service.usecases.models import create_model
from service.worker import run_worker
from tests.service.helpers import ingest_raw

# Fast settings for tests: a version after 0.5 s of quiet, short leases.
FAST = {
    "KEELSON_WORKER_IDLE_SECONDS": 0.5,
    "KEELSON_WORKER_POLL_SECONDS": 0.05,
    "KEELSON_WORKER_CLAIM_SECONDS": 0.2,
    "KEELSON_WORKER_LEASE_SECONDS": 3.0,
    "KEELSON_WORKER_PROGRESS_SECONDS": 0.0,
}


def database(url: str) -> Database:
    engine = make_engine(url)
    return Database(engine=engine, read=make_sessionmaker(engine),
                    write=make_sessionmaker(engine, write=True))


def numeric_spec(name: str, fields: Sequence[str], **overrides: Any) -> dict[str, Any]:
    spec: dict[str, Any] = {
        "name": name,
        "task": "binary",
        "target": "label",
        "features": [{"name": field, "type": "numeric"} for field in fields],
    }
    training = overrides.pop("training", {})
    spec.update(overrides)
    spec["training"] = training
    return spec


def new_model(db: Database, spec: dict[str, Any]) -> int:
    create_model(db, spec)
    with db.read() as session:
        return int(session.scalars(select(ModelRow.id).where(ModelRow.name == spec["name"])).one())


def send(db: Database, name: str, records: Sequence[dict[str, Any]], batch: int = 500) -> None:
    for start in range(0, len(records), batch):
        ingest_raw(db.write, name, list(records[start:start + batch]))


@contextlib.contextmanager
def worker_thread(url: str, worker_id: str = "test-worker", **settings: Any) -> Iterator[None]:
    """A worker running on a thread until the block ends (then stopped cleanly)."""
    stop = threading.Event()
    config = {"KEELSON_DATABASE_URL": url, **FAST, **settings}
    failure: list[BaseException] = []

    def run() -> None:
        try:
            run_worker(config, stop=stop, worker_id=worker_id)
        except BaseException as exc:  # surfaced in the test below
            failure.append(exc)

    thread = threading.Thread(target=run, daemon=True)
    thread.start()
    try:
        yield
    finally:
        stop.set()
        thread.join(60)
    assert not thread.is_alive(), "the worker did not stop"
    if failure:
        raise failure[0]


def wait_until(check: Callable[[], Any], timeout: float = 30.0, every: float = 0.05) -> Any:
    deadline = time.monotonic() + timeout
    while True:
        value = check()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout} s waiting for {check}")
        time.sleep(every)


def caught_up(db: Database, model_id: int) -> bool:
    """The trainer's stored cursor has reached the model's last record."""
    with db.read() as session:
        cursor = session.get(TrainerRow, model_id).cursor  # type: ignore[union-attr]
        top = session.scalar(select(RecordRow.seq).where(RecordRow.model_id == model_id)
                             .order_by(RecordRow.seq.desc()).limit(1))
        return top is not None and cursor == top


def versions(db: Database, model_id: int) -> list[VersionRow]:
    with db.read() as session:
        return list(session.scalars(select(VersionRow).where(VersionRow.model_id == model_id)
                                    .order_by(VersionRow.number)))


def trainer(db: Database, model_id: int) -> TrainerRow:
    with db.read() as session:
        row = session.get(TrainerRow, model_id)
        assert row is not None
        return row


def model_row(db: Database, model_id: int) -> ModelRow:
    with db.read() as session:
        row = session.get(ModelRow, model_id)
        assert row is not None
        return row


ROOT = Path(__file__).resolve().parents[2]


def start_worker_process(url: str, worker_id: str, log: Path,
                         **settings: str) -> subprocess.Popen[bytes]:
    """``python -m service.worker ID`` (what ``keelson worker --id`` runs)."""
    env = {**os.environ, "KEELSON_DATABASE_URL": url, "PYTHONPATH": str(ROOT),
           **{key: str(value) for key, value in FAST.items()}, **settings}
    with log.open("ab") as out:
        return subprocess.Popen([sys.executable, "-m", "service.worker", worker_id],
                                cwd=ROOT, env=env, stdout=out, stderr=subprocess.STDOUT)


def stop_process(process: subprocess.Popen[bytes], signum: int = signal.SIGTERM) -> int:
    if process.poll() is None:
        process.send_signal(signum)
    return process.wait(30)


def uninterrupted(db: Database, model_id: int) -> Learner:
    """One pass of the engine alone over the model's train records in sequence
    order, from the same spec and warm-up records a worker starts from."""
    with db.read() as session:
        spec = session.get(ModelRow, model_id).spec  # type: ignore[union-attr]
        rows = session.execute(
            select(RecordRow.features, RecordRow.label)
            .where(RecordRow.model_id == model_id, RecordRow.split == "train")
            .order_by(RecordRow.seq)
        ).all()
    features, labels = [r[0] for r in rows], [r[1] for r in rows]
    warmup = spec["training"]["warmup_records"]
    learner = Learner.create(spec, warmup=features[:warmup], warmup_labels=labels[:warmup])
    learner.learn(learner.encode(features), learner.encode_labels(labels))
    return learner


def assert_same_state(resumed: Learner, replay: Learner) -> None:
    """Bit-identical weights, optimizer state and prequential sums."""
    assert resumed.records_seen == replay.records_seen
    assert resumed.network.params.tobytes() == replay.network.params.tobytes()
    replay_state = replay.optimizer.state_arrays()
    for name, array in resumed.optimizer.state_arrays().items():
        assert array.tobytes() == replay_state[name].tobytes(), name
    assert resumed.prequential_metrics() == replay.prequential_metrics()


def assert_one_chain(db: Database, model_id: int) -> list[VersionRow]:
    """The online versions form one chain: each the child of the one before,
    cursors and records seen strictly increasing (one writer at a time)."""
    chain = versions(db, model_id)
    assert chain and chain[0].parent_id is None
    assert [v.number for v in chain] == list(range(1, len(chain) + 1))
    for parent, child in zip(chain, chain[1:], strict=False):
        assert child.parent_id == parent.id
        assert child.cursor > parent.cursor and child.records_seen > parent.records_seen
    return chain
