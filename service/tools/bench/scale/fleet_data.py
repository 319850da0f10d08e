"""The invented fleet a scale run learns: many small models, records stored in bulk.

Each model stands for one pump station's seal-wear score: 7 numeric
readings, a binary label from a noisy linear rule of its own (invented, there
only so each network has something to learn), 7-16-8-1 networks. Models are
made by the same use case as ``POST /v1/models`` and their records stored by
the same function as ingest (``store_records``: ``COPY`` on PostgreSQL, one
``executemany`` on SQLite), one transaction per model.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import uuid
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

FIELDS = [f"reading_{i}" for i in range(7)]
HIDDEN = [16, 8]


def fleet_spec(name: str) -> dict[str, Any]:
    # Defaults kept (checkpoint interval, warm-up, holdout share): the figures
    # are for a model as a user makes one.
    return {"name": name, "task": "binary", "target": "seal_worn",
            "features": [{"name": field, "type": "numeric"} for field in FIELDS],
            "hidden_layers": HIDDEN, "activation": "tanh", "promotion": "auto"}


@dataclass(frozen=True)
class Fleet:
    """What was stored: model ids and names, and per model its record count."""

    ids: list[int]
    names: list[str]
    records: dict[int, int]

    @property
    def total(self) -> int:
        return sum(self.records.values())


def invented_records(rng: np.random.Generator, count: int) -> list[dict[str, Any]]:
    direction = rng.normal(size=len(FIELDS))
    X = rng.normal(size=(count, len(FIELDS)))
    labels = (X @ direction + rng.normal(size=count)) > 0
    return [{"features": dict(zip(FIELDS, row, strict=True)), "label": bool(label)}
            for row, label in zip(X.tolist(), labels.tolist(), strict=True)]


def store_fleet(url: str, counts: list[int], prefix: str, seed: int = 2026) -> Fleet:
    """Make ``len(counts)`` models on the (migrated) database at ``url``, the
    i-th with ``counts[i]`` records."""
    from service.config import load_config
    from service.store.database import open_database
    from service.usecases.model_limits import ModelLimits
    from service.usecases.models import create_model

    db = open_database(url)
    limits = ModelLimits.from_config(load_config({"KEELSON_DATABASE_URL": url}))
    rng = np.random.default_rng(seed)
    ids, names, records = [], [], {}
    try:
        for index, count in enumerate(counts):
            name = f"{prefix}-{index:04d}"
            create_model(db, fleet_spec(name), limits)
            model_id = model_id_of(db, name)
            append_records(db, model_id, invented_records(rng, count))
            ids.append(model_id)
            names.append(name)
            records[model_id] = count
    finally:
        db.engine.dispose()
    from service.store.database import make_engine, refresh_planner_statistics

    engine = make_engine(url)
    try:  # as autovacuum would within a minute of the load (see bench worker)
        refresh_planner_statistics(engine, "records")
    finally:
        engine.dispose()
    return Fleet(ids, names, records)


def model_id_of(db: Any, name: str) -> int:
    from sqlalchemy import select

    from service.store.tables import ModelRow

    with db.read() as session:
        return int(session.scalar(select(ModelRow.id).where(ModelRow.name == name)))


def append_records(db: Any, model_id: int, records: list[dict[str, Any]]) -> None:
    """Store ``records`` for one model, as ingest does (under its model lock)."""
    from service.store.database import transaction
    from service.store.tables import ModelRow
    from service.usecases.records import store_records

    with transaction(db.write) as session:
        model = session.get(ModelRow, model_id, with_for_update=True)
        assert model is not None
        store_records(session, model, list[Mapping[str, Any]](records))


@contextlib.contextmanager
def copy_of(url: str) -> Iterator[str]:
    """A fresh copy of the database at ``url`` (nobody connected to it),
    dropped afterwards: each run starts from the same stored records."""
    if url.startswith("sqlite:///"):
        source = url.removeprefix("sqlite:///")
        target = f"{source}.{uuid.uuid4().hex[:8]}"
        shutil.copyfile(source, target)
        try:
            yield f"sqlite:///{target}"
        finally:
            with contextlib.suppress(OSError):
                os.remove(target)
        return
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    name = f"{make_url(url).database}_{uuid.uuid4().hex[:6]}"
    admin = create_engine(make_url(url).set(database="postgres"), isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as connection:
            connection.execute(text(
                f'CREATE DATABASE "{name}" TEMPLATE "{make_url(url).database}"'))
        yield make_url(url).set(database=name).render_as_string(hide_password=False)
    finally:
        with admin.connect() as connection:
            connection.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()
