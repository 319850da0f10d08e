"""Per-request cost of GET predictions beside a trivial route, in process.

Run: ``.venv/bin/python -m tests.benchmarks.predictions_client [--rounds N]``

Uses the Flask test client (no sockets, no server), so it isolates what the
app spends per request. Routes are measured in interleaved rounds and the
minimum per round is reported, in CPU time of this process, which keeps the
figures usable on a machine shared with other work. Not a test: nothing here
asserts, and the suite does not collect it.
"""

from __future__ import annotations

import argparse
import json
import statistics
import tempfile
import time
from pathlib import Path
from typing import Any

from service.store.schema import upgrade_database
from service.web.app import create_app
from tests.service.helpers import ADMIN_TOKEN, ApiClient, create_model
from tests.service.predictions_factory import (
    add_version,
    pump_rows,
    pump_rule,
    stored_spec,
    train_learner,
)

QUERY = "/v1/models/pump-risk/predictions?vibration_rms=72.5&pump_family=screw&has_vfd=false"
ROUTES = {
    "trivial (/healthz)": ("/healthz", False),
    "predict explain=none": (f"{QUERY}&explain=none", True),
    "predict gradient": (f"{QUERY}&explain=gradient", True),
    "predict integrated_gradients": (QUERY, True),
}


def measure(rounds: int, per_round: int) -> dict[str, Any]:
    with tempfile.TemporaryDirectory() as folder:
        url = f"sqlite:///{Path(folder) / 'bench.db'}"
        upgrade_database(url)
        app = create_app({"KEELSON_DATABASE_URL": url, "KEELSON_ADMIN_TOKEN": ADMIN_TOKEN})
        create_model(ApiClient(app))
        learner = train_learner(stored_spec(app, "pump-risk"), pump_rows(300), pump_rule)
        add_version(app, "pump-risk", learner.to_bytes())
        client = app.test_client()
        auth = {"Authorization": f"Bearer {ADMIN_TOKEN}"}
        for path, needs_token in ROUTES.values():
            for _ in range(200):  # warm caches, readers, the version
                response = client.get(path, headers=auth if needs_token else {})
                assert response.status_code == 200, response.get_data(True)
        cpu: dict[str, list[float]] = {name: [] for name in ROUTES}
        wall: dict[str, list[float]] = {name: [] for name in ROUTES}
        for _ in range(rounds):
            for name, (path, needs_token) in ROUTES.items():
                headers = auth if needs_token else {}
                started_cpu, started_wall = time.process_time(), time.perf_counter()
                for _ in range(per_round):
                    client.get(path, headers=headers)
                cpu[name].append((time.process_time() - started_cpu) / per_round * 1e6)
                wall[name].append((time.perf_counter() - started_wall) / per_round * 1e6)
    trivial = min(cpu["trivial (/healthz)"])
    return {
        name: {
            "cpu_us_min": round(min(cpu[name]), 1),
            "cpu_us_median": round(statistics.median(cpu[name]), 1),
            "wall_us_min": round(min(wall[name]), 1),
            "cpu_us_over_trivial": round(min(cpu[name]) - trivial, 1),
        }
        for name in ROUTES
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=15)
    parser.add_argument("--per-round", type=int, default=200)
    args = parser.parse_args()
    print(json.dumps(measure(args.rounds, args.per_round), indent=2))


if __name__ == "__main__":
    main()
