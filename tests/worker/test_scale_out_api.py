"""Scale-out as an operator runs it: two API processes and two workers on one
PostgreSQL, several models (docs/architecture.md, "Scale-out").

Records sent through one API process are trained by whichever worker holds
each model's lease and served by both API processes; a promotion (a rollback)
made through one API process is served by the other within the staleness
bound of the active pointer (1 s; invariant 3). The bound is ours; the check
is common practice, no source.
"""

from __future__ import annotations

import contextlib
import time
from pathlib import Path

import numpy as np
import pytest

from tests.reliability.harness import Client, api_server, wait_for, worker_process

pytestmark = pytest.mark.slow
STALENESS_BOUND = 1.0
MODELS = ["station-north", "station-south"]


def spec(name: str) -> dict:
    return {
        "name": name, "task": "binary", "target": "failed",
        "features": [{"name": "a", "type": "numeric"}, {"name": "b", "type": "numeric"}],
        "hidden_layers": [6],
        "training": {"checkpoint_every": 150, "warmup_records": 32, "seed": 1},
    }


def batch(n: int, seed: int) -> dict:
    rng = np.random.default_rng(seed)
    points = rng.normal(size=(n, 2))
    return {"records": [{"key": f"r{seed}-{i}", "features": {"a": float(a), "b": float(b)},
                         "label": bool(a * b > 0)} for i, (a, b) in enumerate(points)]}


def served_version(client: Client, name: str) -> int:
    status, body, _ = client.request("GET", f"/v1/models/{name}/predictions?a=0.3&b=-0.2"
                                            "&explain=none")
    assert status == 200, body
    return int(body["version"])


def test_two_api_processes_and_two_workers_share_models_and_see_promotions_in_bound(
    postgres_url: str, tmp_path: Path
) -> None:
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    with contextlib.ExitStack() as stack:
        base_a, _ = stack.enter_context(api_server(postgres_url, tmp_path / "a", workers=1))
        base_b, _ = stack.enter_context(api_server(postgres_url, tmp_path / "b", workers=1))
        for wid in ("w1", "w2"):
            (tmp_path / wid).mkdir()
            stack.enter_context(worker_process(postgres_url, tmp_path / wid, worker_id=wid))
        a, b = Client(base_a), Client(base_b)

        for k, name in enumerate(MODELS):
            status, body, _ = a.request("POST", "/v1/models", spec(name))
            assert status == 201, body
            status, body, _ = a.request("POST", f"/v1/models/{name}/records", batch(600, k))
            assert status == 201 and body == {"accepted": 600, "duplicates": 0}, body

        def settled(name: str) -> bool:
            status, model, _ = b.request("GET", f"/v1/models/{name}")
            _, listing, _ = b.request("GET", f"/v1/models/{name}/versions")
            return (status == 200 and model["trainer"]["lag"] == 0
                    and model["active_version"] is not None
                    and len(listing["versions"]) >= 2)

        for name in MODELS:
            wait_for(lambda n=name: settled(n), timeout=120)

        for name in MODELS:
            _, listing, _ = b.request("GET", f"/v1/models/{name}/versions")
            numbers = sorted(v["number"] for v in listing["versions"])
            # Each model's lineage had one writer: its versions number 1..n without gaps.
            assert numbers == list(range(1, len(numbers) + 1))
            active = served_version(b, name)
            assert served_version(a, name) == active
            older = next(n for n in numbers if n != active)

            status, body, _ = a.request("POST", f"/v1/models/{name}/versions/{older}/promote")
            assert status == 200, body
            promoted_at = time.monotonic()
            # Neither API process is told: each sees the new pointer once its
            # cached one is older than the bound (the promoting one included).
            for client in (b, a):
                while served_version(client, name) != older:
                    assert time.monotonic() - promoted_at <= STALENESS_BOUND + 0.5, (
                        "an API process still serves the old version past the bound")
                    time.sleep(0.05)
