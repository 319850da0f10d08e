"""Helpers for worker tests: models and records through the service's own use
cases, a worker on a thread or in its own process, and waiting for the
database or a log to say something.

Waiting is always for an observable event; the time-outs are failure bounds
only, generous enough for a busy 2-core machine, and cost nothing when the
event comes."""

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

from sqlalchemy import func, select

from engine import Learner
from service.config import DEFAULTS
from service.store.database import Database, make_engine, make_sessionmaker
from service.store.tables import ModelRow, RecordRow, TrainerRow, VersionRow
from service.usecases.model_limits import ModelLimits
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
    create_model(db, spec, ModelLimits.from_config(DEFAULTS))
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


def wait_until(check: Callable[[], Any], timeout: float = 60.0, every: float = 0.05) -> Any:
    """Poll ``check`` until it returns something true, and return that; fail
    after ``timeout`` seconds (a bound on failure, never a schedule)."""
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
    """``python -m service.worker ID`` (what ``keelson worker --id`` runs), its
    output appended to ``log``, returned once it is running (see
    ``wait_until_running``)."""
    env = {**os.environ, "KEELSON_DATABASE_URL": url, "PYTHONPATH": str(ROOT),
           **{key: str(value) for key, value in FAST.items()}, **settings}
    since = log.stat().st_size if log.exists() else 0
    with log.open("ab") as out:
        process = subprocess.Popen([sys.executable, "-m", "service.worker", worker_id],
                                   cwd=ROOT, env=env, stdout=out, stderr=subprocess.STDOUT)
    try:
        wait_until_running(process, worker_id, log, since)
    except BaseException:
        process.kill()
        process.wait()
        raise
    return process


def wait_until_running(process: subprocess.Popen[bytes], worker_id: str, log: Path,
                       since: int = 0, timeout: float = 120.0) -> None:
    """Wait for the worker's start line, ``worker <id> started``, in ``log``
    past byte ``since`` (the log's size when the process was started).

    The line is written when the worker's loop starts, after its SIGTERM
    handler is in place: from then on SIGTERM is a clean stop (status 0, a
    version for what was applied). Before it, the product still stops cleanly
    once our code runs (service/process.py), but the interpreter's own first
    ~40 ms (site, the editable-install finder) run before any code of ours,
    and a SIGTERM that lands there ends the process with -15. So a test that
    means "stop a running worker" waits for this line first, and never races
    the worker's start-up.
    """
    wait_for_line(process, log, f"worker {worker_id} started", since, timeout)


def wait_for_line(process: subprocess.Popen[bytes], log: Path, text: str, since: int = 0,
                  timeout: float = 120.0) -> None:
    """Wait until ``text`` is in ``log`` past byte ``since``; fail at once
    (with the log's tail) if ``process`` exits first."""
    needle = text.encode()

    def written() -> bool:
        with log.open("rb") as sink:
            sink.seek(since)
            if needle in sink.read():
                return True
        if process.poll() is not None:
            tail = log.read_bytes()[since:][-3000:].decode("utf-8", "replace")
            raise AssertionError(f"exited with status {process.returncode} before "
                                 f"writing {text!r}:\n{tail}")
        return False

    wait_until(written, timeout=timeout)


def stop_process(process: subprocess.Popen[bytes], signum: int = signal.SIGTERM) -> int:
    """Signal ``process`` and return its exit status (a minute's bound: a
    clean stop writes a version first)."""
    if process.poll() is None:
        process.send_signal(signum)
    return process.wait(60)


def uninterrupted(db: Database, model_id: int, upto: int | None = None) -> Learner:
    """One pass of the engine alone over the model's train records in sequence
    order (up to record ``upto``), from the same spec and warm-up records a
    worker starts from."""
    with db.read() as session:
        spec = session.get(ModelRow, model_id).spec  # type: ignore[union-attr]
    features, labels = train_records(db, model_id, after=0, upto=upto)
    warmup = spec["training"]["warmup_records"]
    learner = Learner.create(spec, warmup=features[:warmup], warmup_labels=labels[:warmup])
    learner.learn(learner.encode(features), learner.encode_labels(labels))
    return learner


def train_records(db: Database, model_id: int, after: int, upto: int | None = None
                  ) -> tuple[list[Any], list[Any]]:
    """(features, labels) of the model's train records with ``after < seq <=
    upto``, in sequence order."""
    query = (select(RecordRow.features, RecordRow.label)
             .where(RecordRow.model_id == model_id, RecordRow.split == "train",
                    RecordRow.seq > after)
             .order_by(RecordRow.seq))
    if upto is not None:
        query = query.where(RecordRow.seq <= upto)
    with db.read() as session:
        rows = session.execute(query).all()
    return [r[0] for r in rows], [r[1] for r in rows]


def assert_trained_exactly_once(db: Database, model_id: int) -> None:
    """The trainer has passed every record of the model, and its head holds
    what the engine alone gets from learning each train record of the head's
    lineage once, in sequence order: from the promoted retrain the lineage
    continues (its snapshot), or from a new network made as a worker makes
    one. A skipped record and a doubled one cannot cancel out here, as they
    would in a count (common practice, no source)."""
    with db.read() as session:
        state = session.get(TrainerRow, model_id)
        assert state is not None and state.head_version_id is not None
        lineage = {v.id: v for v in session.scalars(
            select(VersionRow).where(VersionRow.model_id == model_id))}
        top = session.scalar(select(func.max(RecordRow.seq))
                             .where(RecordRow.model_id == model_id))
    head = lineage[state.head_version_id]
    assert state.cursor == top
    # Past the head's cursor, the trainer moved over holdout records only.
    assert train_records(db, model_id, after=head.cursor, upto=state.cursor) == ([], [])
    if head.origin != "online":
        return  # a retrain's version: a batch fit, not a stream
    start = head
    while start.origin == "online" and start.parent_id is not None:
        start = lineage[start.parent_id]
    if start.origin == "online":  # the lineage's root: a network made from warm-up records
        replay = uninterrupted(db, model_id, upto=head.cursor)
    else:
        replay = Learner.from_bytes(start.snapshot)
        features, labels = train_records(db, model_id, after=start.cursor, upto=head.cursor)
        if features:
            replay.learn(replay.encode(features), replay.encode_labels(labels))
    assert_same_state(Learner.from_bytes(head.snapshot), replay)


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
