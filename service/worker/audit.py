"""Auditing a version by replay: rebuild it (replay.py), compare it with
the stored snapshot (engine/snapshot_diff.py), and say what was found.

The three outcomes are ``keelson replay``'s exit statuses: identical (0),
differs (1, naming the first parameter that differs and by how much),
records forgotten (2, how many; a mismatch then proves nothing, so none is
reported). A version whose snapshot retention pruned has nothing to compare
with: asked to (``store_pruned``), the audit stores the rebuilt snapshot in
its place, and the version can serve again (rebuilt, status 0).
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy import select, update
from sqlalchemy.orm import Session, sessionmaker

from engine import SnapshotError
from engine.snapshot_diff import Difference, first_difference
from service.errors import NotFoundError
from service.store.tables import ModelRow, VersionRow
from service.usecases.common import find_model
from service.worker.replay import CannotReplay, Progress, RecordsForgotten, rebuild_snapshot

IDENTICAL, DIFFERS, FORGOTTEN = 0, 1, 2


@dataclass(frozen=True)
class Audit:
    """What a replay of version ``number`` of ``model`` found."""

    model: str
    number: int
    origin: str
    status: int  # IDENTICAL, DIFFERS or FORGOTTEN
    difference: Difference | None = None
    forgotten: RecordsForgotten | None = None
    rebuilt: bool = False  # a pruned snapshot rebuilt and stored back


    def describe(self) -> str:
        head = f"{self.model} version {self.number} ({self.origin})"
        if self.rebuilt:
            return (f"{head}: its pruned snapshot was rebuilt from the record log and "
                    "stored; the version can serve, be exported and be promoted again")
        if self.status == IDENTICAL:
            return f"{head}: identical"
        if self.forgotten is not None:
            return (f"{head}: {self.forgotten.missing} of the {self.forgotten.seen} train "
                    f"records it learned (at or below record {self.forgotten.cursor}) were "
                    "forgotten; it cannot be rebuilt as it was, so it is not compared")
        assert self.difference is not None
        return f"{head}: differs at {self.difference.describe()}"


def audit_version(reads: sessionmaker[Session], model: str, number: int | None,
                  chunk_records: int, progress: Progress | None = None,
                  store_pruned: sessionmaker[Session] | None = None) -> Audit:
    """Replay version ``number`` of ``model`` (None: the active version).
    NotFoundError for a model or version that is not there, CannotReplay
    for one that cannot be rebuilt or has no stored snapshot to compare.
    With ``store_pruned`` (write sessions), a pruned snapshot is rebuilt and
    stored back instead of refused."""
    with reads() as session:
        row = find_model(session, model)
        version_id = _version_id(session, row, number)
        found = session.execute(
            select(VersionRow.number, VersionRow.origin, VersionRow.snapshot)
            .where(VersionRow.id == version_id)).one()
    number, origin, stored = int(found[0]), str(found[1]), found[2]
    if stored is None and store_pruned is None:
        raise CannotReplay(f"version {number}'s snapshot was pruned by retention, so there "
                           "is nothing to compare with; --store rebuilds it and stores it back")
    try:
        rebuilt = rebuild_snapshot(reads, row.id, version_id, chunk_records, progress)
    except RecordsForgotten as forgotten:
        return Audit(model, number, origin, FORGOTTEN, forgotten=forgotten)
    if stored is None:
        assert store_pruned is not None
        # Only into an empty place: a snapshot is written once (invariant 3).
        with store_pruned.begin() as session:
            session.execute(update(VersionRow)
                            .where(VersionRow.id == version_id, VersionRow.snapshot.is_(None))
                            .values(snapshot=rebuilt, pruned_at=None))
        return Audit(model, number, origin, IDENTICAL, rebuilt=True)
    try:
        difference = first_difference(bytes(stored), rebuilt)
    except SnapshotError as exc:  # ours always reads: the stored one does not
        difference = Difference("the stored snapshot", f"unreadable ({exc})", "readable")
    return Audit(model, number, origin, IDENTICAL if difference is None else DIFFERS,
                 difference=difference)


def _version_id(session: Session, model: ModelRow, number: int | None) -> int:
    if number is None:
        if model.active_version_id is None:
            raise NotFoundError(f"Model {model.name!r} has no active version yet; "
                                "name one with --version.")
        return int(model.active_version_id)
    found = session.scalar(select(VersionRow.id).where(
        VersionRow.model_id == model.id, VersionRow.number == number))
    if found is None:
        raise NotFoundError(f"Model {model.name!r} has no version {number}.")
    return int(found)
