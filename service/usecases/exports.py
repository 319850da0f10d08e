"""Use case: a version exported in an open format (ONNX) for use outside Keelson,
or as Keelson's own snapshot file (service/usecases/snapshot_file.py).

The version comes through the version cache, so the graph is built from the
very learner that serves its predictions (the snapshot is read once).
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy.orm import Session, sessionmaker

from service.usecases.onnx_graph import onnx_bytes
from service.usecases.predictions import find_model, load_version
from service.usecases.snapshot_file import SNAPSHOT_MEDIA_TYPE, snapshot_file
from service.versions.cache import VersionCache

EXPORT_FORMATS = ("onnx", "snapshot")
ONNX_MEDIA_TYPE = "application/octet-stream"


@dataclass(frozen=True)
class Export:
    data: bytes
    filename: str
    media_type: str


def export_version(cache: VersionCache, sessions: sessionmaker[Session], name: str,
                   number: int, format: str) -> Export:
    """Version ``number`` of model ``name`` as a file in ``format`` (one of
    EXPORT_FORMATS, checked by the caller); NotFoundError for an unknown model or
    version."""
    if format == "snapshot":
        data = snapshot_file(sessions, name, number)
        return Export(data, f"{name}-v{number}.keelson", SNAPSHOT_MEDIA_TYPE)
    entry = find_model(cache, name)
    loaded = load_version(cache, entry, number)
    data = onnx_bytes(loaded.learner, entry.name, loaded.number)
    return Export(data, f"{entry.name}-v{loaded.number}.onnx", ONNX_MEDIA_TYPE)
