"""Training cannot poison the active model (docs/architecture.md, invariant 6)."""

from __future__ import annotations

import time

import numpy as np

from engine import Learner
from service.versions.writes import stop_lineage
from service.worker.leasing import claim_trainers
from tests.worker.helpers import (
    database,
    model_row,
    new_model,
    send,
    trainer,
    versions,
    wait_until,
    worker_thread,
)


def test_a_diverging_lineage_stops_with_its_error_and_the_active_version_keeps_serving(
    database_url: str,
) -> None:
    """A learning rate that is stable on the first half of a stream and far too
    large for the second (inputs 100 times larger, clipping off) blows up the
    weights; plain gradient descent diverges once the step exceeds 2 / curvature
    (common practice, no source). The lineage must stop with the error recorded,
    promote nothing after it, and leave the active version as it was."""
    db = database(database_url)
    spec = {
        "name": "diverges", "task": "regression", "target": "y",
        "features": [{"name": "x", "type": "numeric"}],
        "hidden_layers": [8], "activation": "relu",
        "training": {"learning_rate": 0.05, "momentum": 0.0, "clip_norm": None,
                     "checkpoint_every": 200, "holdout_fraction": 0.2},
    }
    model_id = new_model(db, spec)
    rng = np.random.default_rng(3)
    calm = rng.normal(size=1000)
    send(db, "diverges", [{"features": {"x": float(x)}, "label": float(2 * x + 1)}
                          for x in calm])
    with worker_thread(database_url):
        wait_until(lambda: model_row(db, model_id).active_version_id is not None)
        wait_until(lambda: len(versions(db, model_id)) >= 4)
        active_before = model_row(db, model_id).active_version_id
        wild = 100 * rng.normal(size=500)
        send(db, "diverges", [{"features": {"x": float(x)}, "label": float(2 * x + 1)}
                              for x in wild])
        wait_until(lambda: trainer(db, model_id).error is not None)
        stopped = versions(db, model_id)
    state = trainer(db, model_id)
    assert state.error is not None and state.error.startswith("NonFiniteError at record")
    assert state.leased_by is None
    assert [v.id for v in versions(db, model_id)] == [v.id for v in stopped]
    model = model_row(db, model_id)
    assert model.active_version_id == active_before
    active = next(v for v in stopped if v.id == active_before)
    learner = Learner.from_bytes(active.snapshot)
    served = learner.predict(learner.encode([{"x": 0.5}]))
    assert np.isfinite(served).all()
    # Every version written before the error holds finite weights.
    for version in stopped:
        assert np.isfinite(Learner.from_bytes(version.snapshot).network.params).all()
    db.engine.dispose()


def test_a_stopped_lineage_is_not_picked_up_again_by_a_new_worker(database_url: str) -> None:
    db = database(database_url)
    spec = {"name": "stopped", "task": "binary", "target": "y",
            "features": [{"name": "x", "type": "numeric"}], "training": {}}
    model_id = new_model(db, spec)
    send(db, "stopped", [{"features": {"x": float(i % 7)}, "label": i % 2 == 0}
                         for i in range(300)])
    with db.write() as session, session.begin():
        claim_trainers(session, "first", 30, 1)
    stop_lineage(db.write, model_id, "first", None, "NonFiniteError at record 1: test")
    with worker_thread(database_url, worker_id="second"):
        time.sleep(1.5)  # several claim rounds
    assert versions(db, model_id) == []
    assert trainer(db, model_id).error == "NonFiniteError at record 1: test"
    db.engine.dispose()
