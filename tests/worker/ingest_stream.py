"""``python -m tests.worker.ingest_stream URL MODEL SEED COUNT``: one ingesting
process for the concurrency tests, sending records through the ingest use
case in batches of random sizes, as fast as it can."""

from __future__ import annotations

import sys

import numpy as np

from service.store.database import make_engine, make_sessionmaker
from tests.service.helpers import ingest_raw

FIELDS = ["a", "b", "c", "d"]


def main(url: str, model: str, seed: int, count: int) -> None:
    engine = make_engine(url)
    writes = make_sessionmaker(engine, write=True)
    rng = np.random.default_rng(seed)
    sent = 0
    while sent < count:
        size = min(int(rng.integers(1, 60)), count - sent)
        X = rng.normal(size=(size, len(FIELDS)))
        batch = [{"key": f"{seed}-{sent + i}",
                  "features": dict(zip(FIELDS, map(float, row), strict=True)),
                  "label": bool(row[0] - row[1] > 0)}
                 for i, row in enumerate(X)]
        ingest_raw(writes, model, batch)
        sent += size
    engine.dispose()


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4]))
