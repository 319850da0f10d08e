"""docs/architecture.md, invariant 1, under concurrent writers: one model's records commit in
sequence order, so a reader never sees seq n+1 committed while seq n can
still appear. Duplicate keys sent concurrently are stored once."""

from __future__ import annotations

import threading
from collections import Counter

from flask import Flask
from sqlalchemy import select

from service.store.tables import ModelRow, RecordRow
from service.web.extensions import get_database
from tests.service.helpers import (
    ApiClient,
    create_model,
    ingest_raw,
    model_row,
    record,
)

WRITERS = 4
BATCHES = 12
BATCH = 40


def committed_seqs(app: Flask, model_id: int) -> list[int]:
    with get_database(app).read() as session:
        return list(session.scalars(
            select(RecordRow.seq).where(RecordRow.model_id == model_id).order_by(RecordRow.seq)))


def stored(app: Flask, name: str) -> tuple[list[str], Counter[str]]:
    """A model's stored keys (in sequence order, repeats kept) and how many of
    its records each split holds."""
    with get_database(app).read() as session:
        rows = session.execute(select(RecordRow.key, RecordRow.split).join(ModelRow)
                               .where(ModelRow.name == name).order_by(RecordRow.seq)).all()
    return [key for key, _ in rows], Counter(split for _, split in rows)


def assert_stored_once(app: Flask, name: str, sent: set[str]) -> None:
    """Every key sent to ``name`` stored once and nothing else (a key set, not a
    count: one lost record and one doubled would cancel out in a count), and
    the model's counters are those of its stored rows."""
    keys, splits = stored(app, name)
    assert len(keys) == len(set(keys)) and set(keys) == sent
    row = model_row(app, name)
    assert (row.records_train, row.records_holdout) == (splits["train"], splits["holdout"])


def test_concurrent_batches_commit_in_sequence_order(any_api: ApiClient, any_app: Flask) -> None:
    create_model(any_api)
    create_model(any_api, name="other")
    model_id = model_row(any_app, "pump-risk").id
    database = get_database(any_app)
    errors: list[BaseException] = []
    done = threading.Event()
    violations: list[tuple[int, int]] = []

    def write(writer: int) -> None:
        try:
            for b in range(BATCHES):
                name = "pump-risk" if (writer + b) % 3 else "other"
                rows = [record(i, key=f"w{writer}-b{b}-{i}") for i in range(BATCH)]
                ingest_raw(database.write, name, rows)
        except BaseException as exc:  # surfaced below
            errors.append(exc)

    def watch() -> None:
        # Whatever a reader has seen, anything that appears later must lie
        # above the highest sequence it saw: the trainer's cursor rule.
        seen: set[int] = set()
        while True:
            finished = done.is_set()
            now = committed_seqs(any_app, model_id)
            top = max(seen, default=0)
            violations.extend((s, top) for s in now if s not in seen and s < top)
            seen.update(now)
            if finished:
                return

    watcher = threading.Thread(target=watch)
    writers = [threading.Thread(target=write, args=(w,)) for w in range(WRITERS)]
    watcher.start()
    for thread in writers:
        thread.start()
    for thread in writers:
        thread.join()
    done.set()
    watcher.join()
    assert errors == []
    assert violations == []
    sent: dict[str, set[str]] = {"pump-risk": set(), "other": set()}
    for writer in range(WRITERS):
        for b in range(BATCHES):
            name = "pump-risk" if (writer + b) % 3 else "other"
            sent[name].update(f"w{writer}-b{b}-{i}" for i in range(BATCH))
    for name, keys in sent.items():
        assert_stored_once(any_app, name, keys)


def test_the_same_keys_sent_concurrently_are_stored_once(
    any_api: ApiClient, any_app: Flask
) -> None:
    create_model(any_api)
    database = get_database(any_app)
    rows = [record(i, key=f"shared-{i}") for i in range(100)]
    results = []
    lock = threading.Lock()

    def send() -> None:
        result = ingest_raw(database.write, "pump-risk", rows)
        with lock:
            results.append(result)

    threads = [threading.Thread(target=send) for _ in range(4)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert sorted(r.accepted for r in results) == [0, 0, 0, 100]
    assert sum(r.duplicates for r in results) == 300
    assert_stored_once(any_app, "pump-risk", {f"shared-{i}" for i in range(100)})
