"""The worker's own promotions are in the model's history, with the holdout
figures that decided them (those of the version rows, not recomputed)."""

from __future__ import annotations

from typing import Any

from service.usecases.history import list_history
from tests.worker.helpers import (
    caught_up,
    database,
    model_row,
    new_model,
    numeric_spec,
    send,
    versions,
    wait_until,
    worker_thread,
)


def rows(n: int, start: int = 0) -> list[dict[str, Any]]:
    return [{"features": {"x": float((start + i) % 11), "z": float((start + i) % 5)},
             "label": "failed" if (start + i) % 3 == 0 else "ok"} for i in range(n)]


def test_an_automatic_promotion_is_an_event_with_its_holdout_figures(database_url: str
                                                                      ) -> None:
    db = database(database_url)
    model_id = new_model(db, numeric_spec("pumps", ["x", "z"], classes=["ok", "failed"],
                                          training={"warmup_records": 20,
                                                    "checkpoint_every": 40}))
    with worker_thread(database_url):
        send(db, "pumps", rows(200))
        wait_until(lambda: caught_up(db, model_id)
                   and model_row(db, model_id).active_version_id is not None)
    events, _ = list_history(db, "pumps", limit=1000)
    promoted = [e for e in events if e["kind"] == "promoted"]
    assert promoted and all(e["token"] is None and e["details"]["automatic"]
                            for e in promoted)
    by_number = {v.number: v for v in versions(db, model_id)}
    first = promoted[0]["details"]
    assert first["replaced"] is None and first["holdout"]["active"] is None
    for event in promoted:
        details = event["details"]
        version = by_number[details["version"]]
        assert details["holdout"]["metric"] == "log_loss"
        assert details["holdout"]["new"] == version.metrics["holdout"].get("log_loss")
    active = by_number[promoted[-1]["details"]["version"]]
    assert model_row(db, model_id).active_version_id == active.id
    db.engine.dispose()
