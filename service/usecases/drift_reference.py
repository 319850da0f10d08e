"""Each version's drift reference, binned once per process.

The reference of a version is the training records it learned from, its last
``REFERENCE_RECORDS`` at most (those with ``seq`` up to the version's cursor,
split ``train``). A version never changes (docs/architecture.md, invariant 3)
and neither do its records, so its bins are computed once and kept by version
id for as long as the bounded LRU holds them.
"""

from __future__ import annotations

from collections.abc import Sequence

from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from engine.drift_bins import FieldBins, reference_bins
from service.store.record_log import read_latest_holdout
from service.store.tables import ModelRow, VersionRow
from service.versions.cache import LRU

REFERENCE_RECORDS = 10_000
# Versions whose bins one process keeps (a few per model: the active one, and
# the one it replaced while predictions of both are still being counted).
REFERENCE_CAPACITY = 64

Bins = tuple[FieldBins, ...]


class ReferenceCache:
    """Binned references by version id; ``get`` never queries, ``load`` does."""

    def __init__(self, sessions: sessionmaker[Session],
                 capacity: int = REFERENCE_CAPACITY) -> None:
        self._sessions = sessions
        self._bins: LRU[int, Bins] = LRU(capacity)

    def get(self, version_id: int) -> Bins | None:
        """The version's bins when this process has them already."""
        return self._bins.get(version_id)

    def load(self, version_id: int) -> Bins | None:
        """The version's bins, read and binned now if need be (None: no such version)."""
        bins = self._bins.get(version_id)
        if bins is None:
            with self._sessions() as session:
                bins = read_reference(session, version_id)
            if bins is not None:
                self._bins.put(version_id, bins)
        return bins


def read_reference(session: Session, version_id: int,
                   limit: int = REFERENCE_RECORDS) -> Bins | None:
    """Bin the latest ``limit`` training records of the version ``version_id``
    over its model's declared features (None when there is no such version)."""
    found = session.execute(
        select(VersionRow.model_id, VersionRow.cursor, ModelRow.spec)
        .join(ModelRow, ModelRow.id == VersionRow.model_id)
        .where(VersionRow.id == version_id)).first()
    if found is None:
        return None
    model_id, cursor, spec = found
    chunk = read_latest_holdout(session, model_id, cursor, limit, split="train")
    features: Sequence[dict[str, object]] = spec["features"]
    return reference_bins(features, chunk.features)
