"""A settings change takes effect at its recorded position: the worker
learns every record up to the change's ``at_seq`` with the old options and
every later one with the new, whether the change came while it was away (a
chunk cut at the position) or while it ran. Checked against the engine run
by hand: the same records, ``Learner.retune`` at the same positions."""

from __future__ import annotations

from typing import Any

import numpy as np

from engine import Learner
from service.config import DEFAULTS
from service.store.tables import TrainerRow, VersionRow
from service.usecases.history import list_history
from service.usecases.model_limits import ModelLimits
from service.usecases.settings import change_settings
from tests.worker.helpers import (
    caught_up,
    database,
    new_model,
    numeric_spec,
    send,
    train_records,
    versions,
    wait_until,
    worker_thread,
)

LIMITS = ModelLimits.from_config(DEFAULTS)


def rows(n: int, start: int = 0) -> list[dict[str, Any]]:
    return [{"features": {"x": float((start + i) % 11), "z": float((start + i) % 5)},
             "label": "failed" if (start + i) % 3 == 0 else "ok"} for i in range(n)]


def change(db: Any, **training: Any) -> int:
    change_settings(db, "pumps", {"training": training}, LIMITS, token="ops", reason=None)
    events, _ = list_history(db, "pumps", limit=1000)
    at_seq: int = events[-1]["at_seq"]
    return at_seq


def head(db: Any, model_id: int) -> Learner:
    with db.read() as session:
        trainer = session.get(TrainerRow, model_id)
        version = session.get(VersionRow, trainer.head_version_id)
        return Learner.from_bytes(version.snapshot)


def test_records_before_a_change_learn_with_the_old_options_after_with_the_new(
        database_url: str) -> None:
    db = database(database_url)
    spec = numeric_spec("pumps", ["x", "z"], classes=["ok", "failed"],
                        training={"warmup_records": 20, "learning_rate": 0.05,
                                  "holdout_fraction": 0.0, "checkpoint_every": 100_000})
    model_id = new_model(db, spec)
    send(db, "pumps", rows(50))
    first = change(db, learning_rate=0.01)  # made while no worker runs
    send(db, "pumps", rows(30, start=50))
    second = change(db, momentum=0.5)
    send(db, "pumps", rows(40, start=80))
    with worker_thread(database_url):
        wait_until(lambda: caught_up(db, model_id))
        third = change(db, learning_rate=0.2)  # made while it runs
        send(db, "pumps", rows(40, start=120))
        wait_until(lambda: caught_up(db, model_id))
    assert 0 < first < second < third

    # By hand: the spec as created, a retune just after each change's position.
    features, labels = train_records(db, model_id, after=0)
    by_hand = Learner.create({**spec, "training": {**spec["training"]}},
                             warmup=features[:20], warmup_labels=labels[:20])
    bounds = [0, first, second, third, None]
    options = [{}, {"learning_rate": 0.01}, {"momentum": 0.5}, {"learning_rate": 0.2}]
    for lower, upper, retune in zip(bounds[:-1], bounds[1:], options, strict=True):
        if retune:
            by_hand.retune(retune)
        part, part_labels = train_records(db, model_id, after=lower, upto=upper)
        by_hand.learn(by_hand.encode(part), by_hand.encode_labels(part_labels))
    worker = head(db, model_id)
    assert np.array_equal(worker.network.params, by_hand.network.params)
    assert worker.spec["training"] == by_hand.spec["training"]

    # Never retuned, the same records give other weights: the changes mattered.
    unchanged = Learner.create(spec, warmup=features[:20], warmup_labels=labels[:20])
    unchanged.learn(unchanged.encode(features), unchanged.encode_labels(labels))
    assert not np.array_equal(unchanged.network.params, worker.network.params)
    made = versions(db, model_id)
    assert made[-1].settings_from_seq == third
    assert all(v.settings_from_seq in (0, first, second, third) for v in made)
    db.engine.dispose()


def test_a_model_from_before_the_history_applies_its_first_change_in_place(
        database_url: str) -> None:
    # Made before migration 0010: no "created" event; its later change still
    # waits for its position.
    from sqlalchemy import delete

    from service.store.tables import ModelEventRow
    db = database(database_url)
    spec = numeric_spec("pumps", ["x", "z"], classes=["ok", "failed"],
                        training={"warmup_records": 20, "holdout_fraction": 0.0})
    model_id = new_model(db, spec)
    with db.write() as session:
        session.execute(delete(ModelEventRow))
        session.commit()
    send(db, "pumps", rows(50))
    at = change(db, learning_rate=0.2)
    send(db, "pumps", rows(30, start=50))
    with worker_thread(database_url):
        wait_until(lambda: caught_up(db, model_id))
    features, labels = train_records(db, model_id, after=0)
    by_hand = Learner.create(spec, warmup=features[:20], warmup_labels=labels[:20])
    for lower, upper in ((0, at), (at, None)):
        if lower:
            by_hand.retune({"learning_rate": 0.2})
        part, part_labels = train_records(db, model_id, after=lower, upto=upper)
        by_hand.learn(by_hand.encode(part), by_hand.encode_labels(part_labels))
    assert np.array_equal(head(db, model_id).network.params, by_hand.network.params)
    db.engine.dispose()
