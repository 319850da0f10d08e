"""``warmup_records: 0`` means "no warm-up": the network is created at the
first train record, numeric fields encoded from their declared bounds (centre
and half-range) or left as they come (centre 0, scale 1), and the regression
target likewise (the encoding policy of DEVELOPERS.md for a field with no
warm-up values)."""

from __future__ import annotations

import numpy as np

from engine import Learner
from tests.worker.helpers import (
    assert_same_state,
    caught_up,
    database,
    model_row,
    new_model,
    send,
    trainer,
    uninterrupted,
    versions,
    wait_until,
    worker_thread,
)


def test_a_model_without_warm_up_trains_from_its_first_record(database_url: str) -> None:
    db = database(database_url)
    spec = {
        "name": "no-warmup", "task": "regression", "target": "flow",
        "features": [{"name": "level", "type": "numeric", "min": 0, "max": 8},
                     {"name": "head", "type": "numeric"}],
        "hidden_layers": [8],
        "training": {"warmup_records": 0, "checkpoint_every": 50, "holdout_fraction": 0.0},
    }
    model_id = new_model(db, spec)
    rng = np.random.default_rng(4)
    send(db, "no-warmup", [{"features": {"level": float(a), "head": float(b)},
                            "label": float(0.5 * a - 0.2 * b)}
                           for a, b in rng.uniform(0, 8, size=(120, 2))])
    with worker_thread(database_url):
        wait_until(lambda: caught_up(db, model_id), timeout=30)
    chain = versions(db, model_id)
    assert trainer(db, model_id).error is None
    assert [v.records_seen for v in chain] == [50, 100, 120]
    assert model_row(db, model_id).active_version_id is not None
    learner = Learner.from_bytes(chain[-1].snapshot)
    assert list(learner.encoder.center) == [4.0, 0.0]
    assert list(learner.encoder.scale) == [4.0, 1.0]
    assert (learner.encoder.target_center, learner.encoder.target_scale) == (0.0, 1.0)
    assert_same_state(learner, uninterrupted(db, model_id))
    db.engine.dispose()
