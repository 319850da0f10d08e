"""The version cache: loaded networks kept by version id, the active pointer
re-read only when older than the staleness bound, counted in real queries."""

from __future__ import annotations

import sys
import threading
from collections.abc import Iterator

import pytest
from sqlalchemy import Engine, event, update

from service.store.database import make_engine, make_sessionmaker
from service.store.tables import ModelRow, VersionRow
from service.versions.cache import (
    LRU,
    ModelNotFound,
    NoActiveVersion,
    SnapshotUnreadable,
    VersionCache,
    VersionNotFound,
)
from service.versions.footprint import MIB, BudgetLRU, resident_bytes


class Clock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


class Unreadable(Exception):
    pass


def load_text(snapshot: bytes) -> str:
    """Stands in for Learner.from_bytes: the cache only needs something built from the bytes."""
    if snapshot.startswith(b"corrupt"):
        raise Unreadable("bad bytes")
    return snapshot.decode()


@pytest.fixture
def engine(sqlite_url: str) -> Iterator[Engine]:
    engine = make_engine(sqlite_url)
    yield engine
    engine.dispose()


class QueryCounter:
    def __init__(self, engine: Engine) -> None:
        self.count = 0
        event.listen(engine, "before_cursor_execute", self._seen)

    def _seen(self, _conn: object, _cursor: object, statement: str, *_rest: object) -> None:
        # Only real queries: the SQLite BEGIN the store emits is not a round trip worth counting.
        if statement.lstrip().upper().startswith("SELECT"):
            self.count += 1


def add_model(engine: Engine, name: str, snapshots: list[bytes], active: int | None) -> int:
    """A model row with one version per snapshot (numbers 1..n), ``active`` the number or None."""
    with make_sessionmaker(engine)() as session:
        model = ModelRow(name=name, spec={"task": "regression", "target": "y", "features": []},
                         records_train=0, records_holdout=0)
        session.add(model)
        session.flush()
        ids = []
        for number, snapshot in enumerate(snapshots, start=1):
            version = VersionRow(model_id=model.id, number=number, origin="online",
                                 status="candidate", snapshot=snapshot, cursor=0,
                                 records_seen=0, metrics={})
            session.add(version)
            session.flush()
            ids.append(version.id)
        if active is not None:
            model.active_version_id = ids[active - 1]
        session.commit()
        return model.id


def promote(engine: Engine, model_id: int, number: int) -> None:
    with make_sessionmaker(engine)() as session:
        version_id = session.query(VersionRow.id).filter_by(model_id=model_id, number=number)
        session.execute(update(ModelRow).where(ModelRow.id == model_id)
                        .values(active_version_id=version_id.scalar_subquery()))
        session.commit()


def make_cache(engine: Engine, clock: Clock, **kwargs: object) -> VersionCache:
    return VersionCache(make_sessionmaker(engine), clock=clock, loader=load_text,
                        load_errors=(Unreadable,), **kwargs)  # type: ignore[arg-type]


def test_a_warm_lookup_of_the_active_version_queries_nothing(engine: Engine) -> None:
    clock = Clock()
    add_model(engine, "pumps", [b"one", b"two"], active=2)
    cache = make_cache(engine, clock, max_age=1.0)
    counter = QueryCounter(engine)
    loaded = cache.version(cache.model("pumps"))
    assert (loaded.number, loaded.learner) == (2, "two")
    cold = counter.count
    assert cold > 0
    for _ in range(100):
        clock.now += 0.005
        again = cache.version(cache.model("pumps"))
        assert again is loaded
    assert counter.count == cold


def test_a_promotion_is_seen_once_the_pointer_is_older_than_the_bound(engine: Engine) -> None:
    clock = Clock()
    model_id = add_model(engine, "pumps", [b"one", b"two"], active=1)
    cache = make_cache(engine, clock, max_age=0.5)
    assert cache.version(cache.model("pumps")).learner == "one"
    promote(engine, model_id, 2)
    clock.now += 0.5  # exactly at the bound: still the copy this process holds
    assert cache.version(cache.model("pumps")).learner == "one"
    clock.now += 0.001
    assert cache.version(cache.model("pumps")).learner == "two"
    promote(engine, model_id, 1)  # rollback: version 1 is still cached, no snapshot read
    clock.now += 0.6
    counter = QueryCounter(engine)
    assert cache.version(cache.model("pumps")).learner == "one"
    assert counter.count == 1  # only the pointer


def test_a_pinned_version_is_resolved_once_then_served_from_memory(engine: Engine) -> None:
    clock = Clock()
    add_model(engine, "pumps", [b"one", b"two", b"three"], active=3)
    cache = make_cache(engine, clock)
    entry = cache.model("pumps")
    counter = QueryCounter(engine)
    assert cache.version(entry, 1).learner == "one"
    assert counter.count == 1
    assert cache.version(entry, 1).learner == "one"
    assert cache.version(entry, 3).learner == "three"  # the active one's number is known
    assert counter.count == 2
    with pytest.raises(VersionNotFound) as missing:
        cache.version(entry, 9)
    assert (missing.value.name, missing.value.number) == ("pumps", 9)


def test_no_active_version_and_unknown_models_are_reported(engine: Engine) -> None:
    clock = Clock()
    add_model(engine, "fresh", [b"one"], active=None)
    cache = make_cache(engine, clock)
    with pytest.raises(NoActiveVersion):
        cache.version(cache.model("fresh"))
    with pytest.raises(ModelNotFound):
        cache.model("absent")
    assert cache.version(cache.model("fresh"), 1).learner == "one"  # pinning still works


def test_no_active_version_is_re_read_before_it_is_answered(engine: Engine) -> None:
    """A model cached before its first version was activated (ingest reads the
    cache too) serves that version at once: a negative answer is never stale."""
    clock = Clock()
    model_id = add_model(engine, "fresh", [b"one"], active=None)
    cache = make_cache(engine, clock)
    entry = cache.model("fresh")
    promote(engine, model_id, 1)
    assert cache.model("fresh") is entry  # still within the staleness bound
    assert cache.version(entry).learner == "one"


def test_an_unreadable_snapshot_fails_the_same_way_without_rereading(engine: Engine) -> None:
    clock = Clock()
    add_model(engine, "pumps", [b"corrupt bytes"], active=1)
    cache = make_cache(engine, clock)
    entry = cache.model("pumps")
    with pytest.raises(SnapshotUnreadable) as first:
        cache.version(entry)
    assert (first.value.name, first.value.number) == ("pumps", 1)
    counter = QueryCounter(engine)
    with pytest.raises(SnapshotUnreadable):
        cache.version(entry)
    assert counter.count == 0


def test_the_loaded_versions_are_bounded_least_recently_used_first(engine: Engine) -> None:
    clock = Clock()
    add_model(engine, "pumps", [b"1", b"2", b"3"], active=1)
    # Room for two loaded versions of this size, not three.
    cache = make_cache(engine, clock, budget_mib=(2 * sys.getsizeof("1") + 8) / MIB)
    entry = cache.model("pumps")
    cache.version(entry, 1)
    cache.version(entry, 2)
    cache.version(entry, 1)  # 1 is now the most recently used
    cache.version(entry, 3)  # evicts 2
    counter = QueryCounter(engine)
    cache.version(entry, 1)
    cache.version(entry, 3)
    assert counter.count == 0
    cache.version(entry, 2)
    assert counter.count == 1


def test_the_staleness_bound_cannot_exceed_one_second(engine: Engine) -> None:
    with pytest.raises(ValueError):
        make_cache(engine, Clock(), max_age=1.5)


def test_the_lru_stays_consistent_under_threads() -> None:
    lru: LRU[int, int] = LRU(8)

    def hammer(offset: int) -> None:
        for i in range(2000):
            lru.put((i + offset) % 20, i)
            lru.get((i * 7 + offset) % 20)

    threads = [threading.Thread(target=hammer, args=(k,)) for k in range(4)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert len(lru) == 8


def test_the_budget_is_bytes_measured_so_one_large_version_displaces_several_small_ones(
    engine: Engine,
) -> None:
    clock = Clock()
    small = [b"a", b"b", b"c"]
    add_model(engine, "pumps", [*small, b"x" * 4000], active=1)
    large = sys.getsizeof("x" * 4000)
    # Room for the three small ones, or the large one: not the large one and a small one.
    cache = make_cache(engine, clock, budget_mib=(large + sys.getsizeof("a") - 1) / MIB)
    entry = cache.model("pumps")
    for number in (1, 2, 3):
        cache.version(entry, number)
    assert cache.usage()["entries"] == 3
    cache.version(entry, 4)
    usage = cache.usage()
    assert usage["entries"] == 1 and usage["bytes"] == large
    assert usage["bytes"] <= usage["budget_bytes"]


def test_the_newest_entry_is_kept_even_when_it_alone_is_over_the_budget() -> None:
    lru: BudgetLRU[int, str] = BudgetLRU(10, sys.getsizeof)
    lru.put(1, "a" * 100)
    lru.put(2, "b" * 100)
    assert 2 in lru and 1 not in lru and len(lru) == 1


def test_an_object_graph_is_measured_once_per_object() -> None:
    import numpy as np

    weights = np.zeros(1000)  # 8,000 bytes of data
    holder = {"weights": weights, "again": weights, "view": weights[:10]}
    measured = resident_bytes(holder)
    assert 8000 < measured < 2 * 8000


def test_an_unknown_name_is_looked_up_once_within_the_bound_and_found_once_made(
    engine: Engine,
) -> None:
    clock = Clock()
    cache = make_cache(engine, clock, max_age=0.5)
    counter = QueryCounter(engine)
    for _ in range(50):
        with pytest.raises(ModelNotFound):
            cache.model("pumps")
        clock.now += 0.001
    assert counter.count == 1
    add_model(engine, "pumps", [b"one"], active=1)  # made by another process
    clock.now += 0.5
    assert cache.version(cache.model("pumps")).learner == "one"


def test_a_model_made_by_this_process_is_found_at_once_after_forget(engine: Engine) -> None:
    clock = Clock()
    cache = make_cache(engine, clock, max_age=1.0)
    with pytest.raises(ModelNotFound):
        cache.model("pumps")
    add_model(engine, "pumps", [b"one"], active=1)
    cache.forget("pumps")  # what the create view does
    assert cache.model("pumps").name == "pumps"


def test_a_cold_load_holds_up_neither_other_versions_nor_loads_it_twice(
    engine: Engine,
) -> None:
    """One version's load is stopped inside the loader; another version loads
    meanwhile, and a second request for the stopped one gets the same object
    from the one load."""
    clock = Clock()
    add_model(engine, "pumps", [b"slow", b"fast"], active=1)
    entered, release = threading.Event(), threading.Event()
    loads: list[bytes] = []

    def loader(snapshot: bytes) -> str:
        loads.append(snapshot)
        if snapshot == b"slow":
            entered.set()
            release.wait()
        return snapshot.decode()

    cache = VersionCache(make_sessionmaker(engine), clock=clock, loader=loader)
    entry = cache.model("pumps")
    got: dict[str, object] = {}
    first = threading.Thread(target=lambda: got.setdefault("first", cache.version(entry, 1)))
    first.start()
    assert entered.wait(60)
    other = threading.Thread(target=lambda: got.setdefault("other", cache.version(entry, 2)))
    other.start()
    other.join(60)
    assert not other.is_alive() and got["other"].learner == "fast"  # type: ignore[attr-defined]
    second = threading.Thread(target=lambda: got.setdefault("second", cache.version(entry, 1)))
    second.start()
    release.set()
    first.join(60)
    second.join(60)
    assert got["first"] is got["second"]
    assert loads.count(b"slow") == 1


def test_stale_pointers_of_many_models_are_read_again_in_one_query(engine: Engine) -> None:
    clock = Clock()
    ids = [add_model(engine, f"station-{k}", [b"one", b"two"], active=1) for k in range(20)]
    cache = make_cache(engine, clock, max_age=1.0)
    for k in range(20):
        cache.version(cache.model(f"station-{k}"))
    promote(engine, ids[7], 2)
    clock.now += 1.001
    counter = QueryCounter(engine)
    served = [cache.model(f"station-{k}").active_version_number for k in range(20)]
    assert counter.count == 1  # one query for the twenty, not one each
    assert served == [2 if k == 7 else 1 for k in range(20)]
