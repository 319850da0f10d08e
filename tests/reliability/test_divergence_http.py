"""Divergence seen from the HTTP side (the worker-level test is
tests/worker/test_guards.py): records sent over HTTP that blow up a high
learning rate stop the lineage; a client reads why in the model's
``trainer.error``, and the active version keeps answering, with the same
numbers as before, while records wait.

Plain gradient descent diverges once the step exceeds 2 / curvature (common
practice, no source): inputs 100 times larger with clipping off do that here.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tests.service.helpers import ApiClient
from tests.worker.helpers import wait_until, worker_thread

pytestmark = pytest.mark.slow
SPEC = {
    "name": "diverges", "task": "regression", "target": "y",
    "features": [{"name": "x", "type": "numeric"}],
    "hidden_layers": [8], "activation": "relu",
    "training": {"learning_rate": 0.05, "momentum": 0.0, "clip_norm": None,
                 "checkpoint_every": 200, "holdout_fraction": 0.2},
}
QUERY = "/v1/models/diverges/predictions?x=0.5&explain=gradient"


def rows(xs: np.ndarray) -> dict:
    return {"records": [{"features": {"x": float(x)}, "label": float(2 * x + 1)} for x in xs]}


def test_a_diverging_stream_stops_the_lineage_and_the_active_version_keeps_serving(
    api: ApiClient, sqlite_url: str
) -> None:
    api.request("POST", "/v1/models", 201, json_body=SPEC)
    rng = np.random.default_rng(3)
    api.request("POST", "/v1/models/diverges/records", 201, json_body=rows(rng.normal(size=1000)))
    with worker_thread(sqlite_url):
        # The calm stream versioned to its last record (no lag): nothing more
        # can be promoted before the wild records come.
        wait_until(lambda: (m := api.request("GET", "/v1/models/diverges", 200))
                   ["active_version"] and m["trainer"]["lag"] == 0
                   and len(api.request("GET", "/v1/models/diverges/versions", 200)
                           ["versions"]) >= 4)
        before = api.request("GET", QUERY, 200)
        api.request("POST", "/v1/models/diverges/records", 201,
                    json_body=rows(100 * rng.normal(size=500)))
        model = wait_until(lambda: (m := api.request("GET", "/v1/models/diverges", 200))
                           ["trainer"].get("error") and m)
        versions = api.request("GET", "/v1/models/diverges/versions", 200)["versions"]
        during = api.request("GET", QUERY, 200)
    assert model["trainer"]["error"].startswith("NonFiniteError at record")
    assert model["trainer"]["lag"] > 0  # the rest of the stream waits
    # Nothing written after the error; what serves is what served before.
    assert api.request("GET", "/v1/models/diverges/versions", 200)["versions"] == versions
    assert all(v["status"] != "active" or v["number"] == model["active_version"]
               for v in versions)
    after = api.request("GET", QUERY, 200)
    assert during["version"] == after["version"] == model["active_version"]
    assert after == during
    assert math.isfinite(after["result"]["value"])
    assert math.isfinite(after["explanation"]["attributions"]["x"])
    assert before["version"] <= after["version"]
