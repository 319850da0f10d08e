"""Use case: a version as Keelson's own snapshot file, and that file restored
into another installation as a new model with that version active.

The file is the version's stored snapshot (engine/snapshot.py: an npz of
plain arrays and one JSON metadata entry, loaded without pickle) with one
more metadata member, ``export``: where it came from (model, version,
origin, records seen, metrics). The arrays are copied as
stored, so the restored version's weights, optimizer and encoding state are
bit for bit the exported ones, and its predictions identical.
docs/snapshot-format.md describes the file.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from engine import snapshot
from engine.errors import SnapshotError
from engine.learner import Learner
from service.errors import InvalidInputError, NotFoundError
from service.store.database import Database, transaction
from service.store.tables import ModelRow, VersionRow
from service.usecases.common import as_utc, find_model
from service.usecases.pruned import snapshot_pruned

SNAPSHOT_MEDIA_TYPE = "application/octet-stream"
EXPORT_KEY = "export"
ORIGINS = ("online", "retrain")


def snapshot_file(sessions: sessionmaker[Session], name: str, number: int) -> bytes:
    """Version ``number`` of model ``name`` as a snapshot file; NotFoundError
    for an unknown model or version."""
    with sessions() as session:
        model = find_model(session, name)
        version = session.execute(select(VersionRow).where(
            VersionRow.model_id == model.id, VersionRow.number == number)).scalar_one_or_none()
        if version is None:
            raise NotFoundError(f"Model {name!r} has no version {number}.",
                                errors={"version": [f"No version {number}."]})
        if version.snapshot is None:
            raise snapshot_pruned(model.name, number, as_utc(version.pruned_at))
        arrays, meta = snapshot.load(version.snapshot)
        meta[EXPORT_KEY] = {
            "model": model.name, "version": version.number, "origin": version.origin,
            "records_seen": version.records_seen, "metrics": version.metrics}
    return snapshot.dump(arrays, meta)


def read_snapshot_file(data: bytes) -> tuple[Learner, dict[str, Any]]:
    """The learner a snapshot file holds and its ``export`` metadata ({} for a
    bare version snapshot); InvalidInputError for bytes that are not one."""
    try:
        _arrays, meta = snapshot.load(data)
        learner = Learner.from_bytes(data)
    except SnapshotError as exc:
        raise InvalidInputError(f"This is not a usable Keelson snapshot file: {exc}") from exc
    provenance = meta.get(EXPORT_KEY)
    return learner, provenance if isinstance(provenance, dict) else {}


def install_version(db: Database, name: str, data: bytes, provenance: Mapping[str, Any]
                    ) -> int:
    """Store ``data`` as version 1 of the new, empty model ``name`` and make it
    active (one transaction); returns the version number.

    The version's cursor is 0: no record of this installation taught it. The
    model's online trainer keeps no head, so online training here starts a
    lineage of its own from this installation's records, and the restored
    version serves until another is promoted."""
    origin = provenance.get("origin")
    metrics = provenance.get("metrics")
    seen = provenance.get("records_seen")
    with transaction(db.write) as session:
        model = find_model(session, name, lock=True)
        if session.scalar(select(VersionRow.id).where(VersionRow.model_id == model.id)):
            raise InvalidInputError(f"Model {name!r} already has versions.")
        version = VersionRow(
            model_id=model.id, number=1, origin=origin if origin in ORIGINS else "online",
            status="active", snapshot=data, cursor=0,
            records_seen=seen if isinstance(seen, int) and seen >= 0 else 0,
            metrics=metrics if isinstance(metrics, dict) else {},
            promoted_at=dt.datetime.now(dt.UTC))
        session.add(version)
        session.flush()
        locked = session.get(ModelRow, model.id)
        assert locked is not None
        locked.active_version_id = version.id
    return 1
