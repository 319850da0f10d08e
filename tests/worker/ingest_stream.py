"""``python -m tests.worker.ingest_stream URL MODEL SEED COUNT [GATE]``: one
ingesting process for the concurrency tests, sending records through the
ingest use case in batches of random sizes, as fast as it can. With a GATE
path, it stops halfway until that file exists (so the test can see the
worker consume while the writers are still writing, without a race)."""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

from service.store.database import make_engine, make_sessionmaker
from tests.service.helpers import ingest_raw

FIELDS = ["a", "b", "c", "d"]
GATE_TIMEOUT_SECONDS = 300.0


def main(url: str, model: str, seed: int, count: int, gate: Path | None = None) -> None:
    engine = make_engine(url)
    writes = make_sessionmaker(engine, write=True)
    rng = np.random.default_rng(seed)
    sent = 0
    while sent < count:
        if gate is not None and sent >= count // 2:
            wait_for_file(gate)
            gate = None
        size = min(int(rng.integers(1, 60)), count - sent)
        X = rng.normal(size=(size, len(FIELDS)))
        batch = [{"key": f"{seed}-{sent + i}",
                  "features": dict(zip(FIELDS, map(float, row), strict=True)),
                  "label": bool(row[0] - row[1] > 0)}
                 for i, row in enumerate(X)]
        ingest_raw(writes, model, batch)
        sent += size
    engine.dispose()


def wait_for_file(path: Path) -> None:
    deadline = time.monotonic() + GATE_TIMEOUT_SECONDS
    while not path.exists():
        if time.monotonic() > deadline:
            raise SystemExit(f"{path} never appeared")
        time.sleep(0.01)


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4]),
         Path(sys.argv[5]) if len(sys.argv) > 5 else None)
