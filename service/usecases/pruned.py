"""The answer for a version whose snapshot retention pruned
(service/worker/snapshot_retention.py): the version is still listed, with
its metrics and lineage, but it cannot predict, be exported or be promoted
until its snapshot is rebuilt by replaying the record log (``keelson replay``).

409, not 410: the state is not permanent, a replay brings the snapshot back.
"""

from __future__ import annotations

import datetime as dt

from service.errors import ConflictError
from service.usecases.common import as_utc

SNAPSHOT_PRUNED = "urn:keelson:problem:snapshot-pruned"


class SnapshotPrunedError(ConflictError):
    problem_type = SNAPSHOT_PRUNED


def snapshot_pruned(name: str, number: int, pruned_at: dt.datetime | None) -> SnapshotPrunedError:
    pruned_at = as_utc(pruned_at)
    when = f" on {pruned_at.isoformat()}" if pruned_at is not None else ""
    return SnapshotPrunedError(
        f"The snapshot of version {number} of model {name!r} was pruned{when} by snapshot "
        "retention (it was never active and is older than KEELSON_SNAPSHOT_RETENTION_DAYS). "
        "Its metrics and lineage are kept; `keelson replay --store` rebuilds its snapshot "
        "from the record log.",
        members={"version": number,
                 "pruned_at": pruned_at.isoformat() if pruned_at is not None else None})
