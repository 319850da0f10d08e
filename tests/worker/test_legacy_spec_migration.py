"""Migration 0003 on both databases: a model stored before the training options
were renamed (``invscaling``/``power_t`` in ``models.spec`` and in its active
version's snapshot) loads, serves and trains on after ``keelson db upgrade``,
with the same schedule, and the schema stays what the code maps."""

from __future__ import annotations

import copy
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from alembic import command
from sqlalchemy import select
from sqlalchemy.engine import make_url

import engine
from engine import Learner
from engine.snapshot import dump, load
from service.store.schema import alembic_config, upgrade_database
from service.store.tables import ModelRow, RecordRow, TrainerRow, VersionRow
from tests.conftest import _admin_execute, _postgres_base_url
from tests.service.conftest import build_app
from tests.service.helpers import ApiClient
from tests.worker.helpers import caught_up, database, versions, wait_until, worker_thread

NEW = {"lr_schedule": "inverse_power", "decay_exponent": 0.3}
OLD = {"lr_schedule": "invscaling", "power_t": 0.3}
APPLIED, PENDING = 40, 30


@pytest.fixture(params=["sqlite", "postgresql"])
def url_at_0002(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """An empty database brought to revision 0002 (before the rename)."""
    if request.param == "sqlite":
        url = f"sqlite:///{tmp_path / 'old.db'}"
        upgrade_database(url, "0002")
        yield url
        return
    base = _postgres_base_url()
    if base is None:
        pytest.skip("KEELSON_TEST_DATABASE_URL is not set")
    name = f"keelson_m_{uuid.uuid4().hex[:12]}"
    _admin_execute(base, f'CREATE DATABASE "{name}"')
    url = make_url(base).set(database=name).render_as_string(hide_password=False)
    try:
        upgrade_database(url, "0002")
        yield url
    finally:
        _admin_execute(base, f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def spelled_old(spec: dict[str, Any]) -> dict[str, Any]:
    old = copy.deepcopy(spec)
    for key in NEW:
        del old["training"][key]
    old["training"].update(OLD)
    return old


def rows(count: int, seed: int) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed)
    return [{"a": float(x), "b": float(y)} for x, y in rng.normal(size=(count, 2))]


def labels(features: list[dict[str, Any]]) -> list[bool]:
    return [row["a"] - row["b"] > 0 for row in features]


def store_old_model(url: str) -> tuple[int, Learner, list[dict[str, Any]]]:
    """What the code before the rename left behind: the spec and the active
    version's snapshot spelled the old way, records past the trainer's cursor.
    Returns the model id, the learner of that version and the pending rows."""
    spec = engine.apply_defaults({
        "name": "old-model", "task": "binary", "target": "label",
        "features": [{"name": "a", "type": "numeric"}, {"name": "b", "type": "numeric"}],
        "hidden_layers": [4],
        "training": {**NEW, "learning_rate": 0.05, "warmup_records": 16,
                     "checkpoint_every": 1000, "holdout_fraction": 0.0},
    })
    features = rows(APPLIED + PENDING, seed=3)
    learner = Learner.create(spec, warmup=features[:16])
    learner.learn(learner.encode(features[:APPLIED]),
                  learner.encode_labels(labels(features[:APPLIED])))
    arrays, meta = load(learner.to_bytes())
    meta = {k: v for k, v in meta.items() if k not in ("format", "format_version")}
    meta["spec"] = spelled_old(meta["spec"])
    snapshot = dump(arrays, meta)
    db = database(url)
    with db.write() as session:
        model = ModelRow(name="old-model", spec=spelled_old(spec),
                         records_train=len(features), records_holdout=0)
        session.add(model)
        session.flush()
        version = VersionRow(model_id=model.id, number=1, origin="online", status="active",
                             snapshot=snapshot, cursor=APPLIED, records_seen=APPLIED,
                             metrics={}, parent_id=None)
        session.add(version)
        session.flush()
        model.active_version_id = version.id
        session.add(TrainerRow(model_id=model.id, cursor=APPLIED, head_version_id=version.id))
        session.add_all(RecordRow(seq=i + 1, model_id=model.id, key=None, features=row,
                                  label=label, split="train")
                        for i, (row, label) in enumerate(zip(features, labels(features),
                                                             strict=True)))
        session.commit()
        model_id = model.id
    db.engine.dispose()
    return model_id, Learner.from_bytes(snapshot), features[APPLIED:]


def stored_training(url: str) -> dict[str, Any]:
    db = database(url)
    with db.read() as session:
        spec = session.scalars(select(ModelRow.spec)).one()
    db.engine.dispose()
    return dict(spec["training"])


def test_an_old_model_loads_serves_and_trains_after_the_upgrade(url_at_0002: str) -> None:
    url = url_at_0002
    model_id, learner, pending = store_old_model(url)
    assert stored_training(url).items() >= OLD.items()

    upgrade_database(url)
    training = stored_training(url)
    assert training.items() >= NEW.items() and "power_t" not in training
    command.check(alembic_config(url))  # raises if the tables differ from the mapping

    app = build_app(url)
    api = ApiClient(app)
    shown = api.request("GET", "/v1/models/old-model", 200)
    assert shown["training"] == training
    scored = api.request("GET", "/v1/models/old-model/predictions?a=0.5&b=-0.5&explain=none",
                         200)
    assert scored["version"] == 1  # the snapshot with the old spelling serves

    db = database(url)
    with worker_thread(url):
        wait_until(lambda: caught_up(db, model_id) and versions(db, model_id)[-1].cursor
                   == APPLIED + PENDING)
    latest = Learner.from_bytes(versions(db, model_id)[-1].snapshot)
    db.engine.dispose()
    # The worker resumed from the old snapshot with the same schedule: its
    # weights are those of the engine continuing the loaded learner.
    learner.learn(learner.encode(pending), learner.encode_labels(labels(pending)))
    assert latest.records_seen == APPLIED + PENDING
    assert latest.spec["training"].items() >= NEW.items()
    assert latest.network.params.tobytes() == learner.network.params.tobytes()


def test_the_downgrade_spells_the_options_the_old_way_again(url_at_0002: str) -> None:
    store_old_model(url_at_0002)
    upgrade_database(url_at_0002)
    command.downgrade(alembic_config(url_at_0002), "0002")
    training = stored_training(url_at_0002)
    assert training.items() >= OLD.items() and "decay_exponent" not in training
