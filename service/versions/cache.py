"""Per-process cache of loaded versions and of each model's active pointer.

Versions are immutable (docs/architecture.md, invariant 3), so a network loaded from a version's
snapshot is kept by version id for as long as the LRU holds it; the LRU is
held to a byte budget (``KEELSON_VERSION_CACHE_MIB``), each version's cost
measured when it is loaded (footprint.py). The only thing that moves is a
model's active-version pointer; it is re-read when the copy this process
holds is older than ``max_age`` seconds, so a promotion is visible everywhere
within that bound and a warm prediction touches no database at all. A name
that is no model is remembered as such for ``max_age`` too: a client asking
for it again and again costs no query each time, and a model created by any
process is served everywhere within the same bound.

A cold load (one query and a snapshot decoded: milliseconds) holds no lock
that other requests wait on: each version is loaded by the first thread that
misses it, and the threads that miss it meanwhile wait for that one load
only (single flight); requests for other versions go on.
"""

from __future__ import annotations

import logging
import threading
import time
from collections import OrderedDict
from collections.abc import Callable, Hashable
from dataclasses import dataclass, field
from typing import Any, Generic, TypeVar

from sqlalchemy import select
from sqlalchemy.orm import Session, aliased, sessionmaker

from service.store.tables import ModelRow, VersionRow
from service.versions.footprint import MIB, BudgetLRU, pooled_bytes, resident_bytes

log = logging.getLogger(__name__)

# Unknown names remembered, and (model, number) -> version id pairs kept.
MISSING_NAMES, NUMBERS = 4096, 4096
# Most models whose active pointers one query re-reads.
POINTER_BATCH = 1000
K = TypeVar("K", bound=Hashable)
V = TypeVar("V")


class ModelNotFound(LookupError):
    def __init__(self, name: str) -> None:
        super().__init__(name)
        self.name = name


class NoActiveVersion(LookupError):
    def __init__(self, name: str) -> None:
        super().__init__(name)
        self.name = name


class VersionNotFound(LookupError):
    def __init__(self, name: str, number: int) -> None:
        super().__init__(name, number)
        self.name = name
        self.number = number


class SnapshotUnreadable(RuntimeError):
    """A stored snapshot failed to load: the version cannot serve."""

    def __init__(self, name: str, number: int) -> None:
        super().__init__(name, number)
        self.name = name
        self.number = number


class LRU(Generic[K, V]):
    """A thread-safe mapping that forgets its least recently used entry past ``capacity``."""

    def __init__(self, capacity: int) -> None:
        if capacity < 1:
            raise ValueError("capacity must be at least 1")
        self.capacity = capacity
        self._items: OrderedDict[K, V] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: K) -> V | None:
        with self._lock:
            value = self._items.get(key)
            if value is not None:
                self._items.move_to_end(key)
            return value

    def put(self, key: K, value: V) -> None:
        with self._lock:
            self._items[key] = value
            self._items.move_to_end(key)
            while len(self._items) > self.capacity:
                self._items.popitem(last=False)

    def pop(self, key: K) -> None:
        with self._lock:
            self._items.pop(key, None)

    def __len__(self) -> int:
        return len(self._items)

    def __contains__(self, key: object) -> bool:
        return key in self._items


@dataclass(frozen=True, slots=True)
class ModelEntry:
    """What this process knows of one model, as read at ``checked_at`` (monotonic)."""

    id: int
    name: str
    spec: dict[str, Any]
    active_version_id: int | None
    active_version_number: int | None
    checked_at: float
    # Objects derived from the spec alone (e.g. request schemas), built once per
    # model and carried across pointer refreshes; the spec of a model never changes.
    derived: dict[str, Any] = field(default_factory=dict, compare=False)


@dataclass(frozen=True, slots=True)
class LoadedVersion:
    """A version ready to serve: its number and the network rebuilt from its snapshot."""

    id: int
    number: int
    # Shared by every thread of the process without a lock: engine inference
    # allocates its work arrays per call and never writes to the network.
    learner: Any


class _Flight:
    """One load in progress: the threads that miss the same version wait on it."""

    __slots__ = ("done", "result", "error")

    def __init__(self) -> None:
        self.done = threading.Event()
        self.result: LoadedVersion | None = None
        self.error: BaseException | None = None


class _Unreadable:
    """Remembered failure to load a version (immutable bytes fail the same way every time)."""

    __slots__ = ("number",)

    def __init__(self, number: int) -> None:
        self.number = number


def _engine_loader() -> tuple[Callable[[bytes], Any], tuple[type[BaseException], ...]]:
    from engine import EngineError, Learner

    return Learner.from_bytes, (EngineError,)


class VersionCache:
    """Answers "which network serves model X (at version N)?" with as few queries as possible."""

    def __init__(
        self,
        sessions: sessionmaker[Session],
        *,
        max_age: float = 1.0,
        budget_mib: float = 128.0,
        clock: Callable[[], float] = time.monotonic,
        loader: Callable[[bytes], Any] | None = None,
        load_errors: tuple[type[BaseException], ...] = (),
    ) -> None:
        if not 0 <= max_age <= 1.0:
            raise ValueError("max_age must lie in [0, 1] seconds (the promised staleness bound)")
        self._sessions = sessions
        self.max_age = max_age
        self._clock = clock
        if loader is None:
            loader, load_errors = _engine_loader()
        self._loader = loader
        self._load_errors = load_errors
        self._models: dict[str, ModelEntry] = {}
        # Names found to be no model, and when (bounded: any client can ask for any name).
        self._missing: LRU[str, float] = LRU(MISSING_NAMES)
        self._versions: BudgetLRU[int, LoadedVersion | _Unreadable] = BudgetLRU(
            max(1, int(budget_mib * MIB)), _cost, _grown)
        # (model id, version number) -> version id: numbers never move once written.
        self._numbers: LRU[tuple[int, int], int] = LRU(NUMBERS)
        self._flights: dict[Any, _Flight] = {}
        self._flights_lock = threading.Lock()  # held for dict operations only

    # -- models -------------------------------------------------------------
    def model(self, name: str) -> ModelEntry:
        """The model called ``name`` with an active pointer at most ``max_age`` old."""
        entry = self._models.get(name)
        if entry is not None and self._clock() - entry.checked_at <= self.max_age:
            return entry
        if entry is None:
            missed_at = self._missing.get(name)
            if missed_at is not None and self._clock() - missed_at <= self.max_age:
                raise ModelNotFound(name)
            return self._refresh(name, entry)
        refreshed = self._refresh_pointers(name)
        return refreshed if refreshed is not None else self._refresh(name, entry)

    def _refresh_pointers(self, name: str) -> ModelEntry | None:
        """Re-read, in one query, the active pointers of ``name`` and of every
        other known model whose copy is past half the bound: with many models
        served round-robin, a query per request (each model's copy found stale
        at its next request) becomes one per half bound. The spec and derived
        objects are kept (a model's spec changes only through this process's
        own PATCH, which forgets it, or is re-read when its id changes). None
        when ``name`` must be read whole (gone, or another model by that name)."""
        now = self._clock()
        stale = [known for known, entry in list(self._models.items())
                 if now - entry.checked_at > self.max_age / 2][:POINTER_BATCH]
        if name not in stale:
            stale.append(name)
        active = aliased(VersionRow)
        with self._sessions() as session:
            rows = session.execute(
                select(ModelRow.name, ModelRow.id, ModelRow.active_version_id, active.number)
                .outerjoin(active, active.id == ModelRow.active_version_id)
                .where(ModelRow.name.in_(stale))
            ).all()
        found = {row[0]: row[1:] for row in rows}
        for known in stale:
            previous = self._models.get(known)
            current = found.get(known)
            if previous is None:
                continue
            if current is None or current[0] != previous.id:
                self._models.pop(known, None)  # read whole at its next use
                continue
            model_id, version_id, number = current
            self._models[known] = ModelEntry(
                id=model_id, name=known, spec=previous.spec, active_version_id=version_id,
                active_version_number=number, checked_at=now, derived=previous.derived)
            if version_id is not None and number is not None:
                self._numbers.put((model_id, number), version_id)
        return self._models.get(name)

    def _refresh(self, name: str, previous: ModelEntry | None) -> ModelEntry:
        now = self._clock()
        active = aliased(VersionRow)
        with self._sessions() as session:
            row = session.execute(
                select(ModelRow.id, ModelRow.spec, ModelRow.active_version_id, active.number)
                .outerjoin(active, active.id == ModelRow.active_version_id)
                .where(ModelRow.name == name)
            ).first()
        if row is None:
            self._models.pop(name, None)
            self._missing.put(name, now)
            raise ModelNotFound(name)
        model_id, spec, version_id, number = row
        same_model = previous is not None and previous.id == model_id
        entry = ModelEntry(
            id=model_id,
            name=name,
            spec=previous.spec if same_model and previous is not None else spec,
            active_version_id=version_id,
            active_version_number=number,
            checked_at=now,
            derived=previous.derived if same_model and previous is not None else {},
        )
        self._models[name] = entry
        if version_id is not None and number is not None:
            self._numbers.put((model_id, number), version_id)
        return entry

    def forget(self, name: str) -> None:
        """Re-read model ``name`` at its next use (it was found to have changed,
        or was made or deleted by this process)."""
        self._models.pop(name, None)
        self._missing.pop(name)

    # -- versions -----------------------------------------------------------
    def version(self, entry: ModelEntry, number: int | None = None) -> LoadedVersion:
        """The active version of ``entry`` (``number=None``) or the pinned one."""
        if number is None:
            if entry.active_version_id is None:
                # "No active version" is re-read before it is answered, so it is
                # never stale: one query, and only while a model has none.
                entry = self._refresh(entry.name, entry)
            if entry.active_version_id is None or entry.active_version_number is None:
                raise NoActiveVersion(entry.name)
            version_id: int | None = entry.active_version_id
        else:
            version_id = self._numbers.get((entry.id, number))
        if version_id is not None:
            cached = self._versions.get(version_id)
            if isinstance(cached, LoadedVersion):
                return cached
            if isinstance(cached, _Unreadable):
                raise SnapshotUnreadable(entry.name, cached.number)
        return self._load(entry, version_id, number)

    def _load(self, entry: ModelEntry, version_id: int | None, number: int | None) -> LoadedVersion:
        """Load a version once however many threads miss it at the same time,
        without holding up the threads that want other versions."""
        key: Any = version_id if version_id is not None else (entry.id, number)
        with self._flights_lock:
            if version_id is not None:
                cached = self._versions.get(version_id)
                if isinstance(cached, LoadedVersion):
                    return cached
            flight = self._flights.get(key)
            leader = flight is None
            if flight is None:
                flight = self._flights[key] = _Flight()
        if not leader:
            flight.done.wait()
            if flight.error is not None:
                raise flight.error
            assert flight.result is not None
            return flight.result
        try:
            flight.result = self._fetch(entry, version_id, number)
            return flight.result
        except BaseException as exc:
            flight.error = exc
            raise
        finally:
            with self._flights_lock:
                self._flights.pop(key, None)
            flight.done.set()

    def _fetch(self, entry: ModelEntry, version_id: int | None, number: int | None
               ) -> LoadedVersion:
        query = select(VersionRow.id, VersionRow.number, VersionRow.snapshot)
        if version_id is not None:
            query = query.where(VersionRow.id == version_id)
        else:
            query = query.where(VersionRow.model_id == entry.id, VersionRow.number == number)
        with self._sessions() as session:
            row = session.execute(query).first()
        if row is None:
            if number is None:  # the active version vanished: re-read the pointer next time
                self._models.pop(entry.name, None)
                raise NoActiveVersion(entry.name)
            raise VersionNotFound(entry.name, number)
        found_id, found_number, snapshot = row
        self._numbers.put((entry.id, found_number), found_id)
        try:
            learner = self._loader(bytes(snapshot))
        except self._load_errors:
            log.exception(
                "snapshot of version %s (id %s) of model %r cannot be loaded",
                found_number,
                found_id,
                entry.name,
            )
            self._versions.put(found_id, _Unreadable(found_number))
            raise SnapshotUnreadable(entry.name, found_number) from None
        loaded = LoadedVersion(id=found_id, number=found_number, learner=learner)
        self._versions.put(found_id, loaded)
        return loaded

    def usage(self) -> dict[str, Any]:
        """The loaded versions: how many, the bytes they hold, the budget."""
        return self._versions.usage()

    def clear(self) -> None:
        """Forget everything (tests; never needed for correctness)."""
        self._models.clear()
        self._missing = LRU(MISSING_NAMES)
        self._versions = BudgetLRU(self._versions.budget, _cost, _grown)
        self._numbers = LRU(self._numbers.capacity)


def _cost(value: LoadedVersion | _Unreadable) -> int:
    return resident_bytes(value.learner) if isinstance(value, LoadedVersion) else 64


def _grown(value: LoadedVersion | _Unreadable) -> int:
    return pooled_bytes(value.learner) if isinstance(value, LoadedVersion) else 0
