"""Pausing a model's online training: the worker leaves it alone while its
records keep arriving (lag grows), and resuming brings the lag to zero.

"Nothing happened" is checked only after something observable happened: a
second, running model reaching zero lag on the same worker, in the same
passes of its loop."""

from __future__ import annotations

from typing import Any

from service.usecases.history import set_paused
from service.usecases.models import get_model
from tests.worker.helpers import (
    caught_up,
    database,
    new_model,
    numeric_spec,
    send,
    wait_until,
    worker_thread,
)


def rows(n: int, start: int = 0) -> list[dict[str, Any]]:
    return [{"features": {"x": float((start + i) % 11), "z": float((start + i) % 5)},
             "label": "failed" if (start + i) % 3 == 0 else "ok"} for i in range(n)]


def spec(name: str) -> dict[str, Any]:
    return numeric_spec(name, ["x", "z"], classes=["ok", "failed"],
                        training={"warmup_records": 20})


def test_a_paused_model_is_not_trained_and_resuming_catches_up(database_url: str) -> None:
    db = database(database_url)
    paused, running = new_model(db, spec("paused")), new_model(db, spec("running"))
    with worker_thread(database_url):
        send(db, "paused", rows(60))
        send(db, "running", rows(60))
        wait_until(lambda: caught_up(db, paused) and caught_up(db, running))
        # Paused mid-lease: the worker holds the model when it is paused.
        set_paused(db, "paused", True, token="night-shift", reason="station shutdown")
        before = get_model(db, "paused")["trainer"]
        assert before["paused"] is True and before["lag"] == 0
        for batch in range(3):  # records still arrive; each batch is a worker pass
            send(db, "paused", rows(40, start=100 + 40 * batch))
            send(db, "running", rows(40, start=100 + 40 * batch))
            wait_until(lambda: caught_up(db, running))
            state = get_model(db, "paused")
            assert state["trainer"]["cursor"] == before["cursor"]
            assert state["trainer"]["lag"] == 40 * (batch + 1)
            assert state["records"]["total"] == 60 + 40 * (batch + 1)
        set_paused(db, "paused", False, token="night-shift", reason=None)
        wait_until(lambda: caught_up(db, paused))
        assert get_model(db, "paused")["trainer"]["lag"] == 0
    db.engine.dispose()
