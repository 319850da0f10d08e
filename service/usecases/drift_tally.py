"""Counting every prediction's fields over its version's reference bins, in
this process, and flushing the counts to the database on an interval.

Predictions must not write to the database (an unkeyed prediction reads
nothing either when warm), so each API process keeps running totals per
(model, active version, hour) in memory and a thread of its own writes them
every ``flush_seconds``, as whole rows only this process writes
(service/store/drift_tallies.py). Gunicorn runs several such processes; each
has its own writer name and rows, and the drift answer adds them up.

A process that dies without flushing loses what it counted since its last
flush: at most one interval of drift data. That is monitoring, not records;
the records a model learns from are written before their answer. A process
that stops cleanly (SIGTERM to gunicorn, the end of a test, the interpreter's
exit) flushes once more: ``close`` stops the thread and writes what is left.

The first predictions of a version this process has no bins for yet are kept
aside (at most ``MAX_WAITING_ROWS``) and counted by the flush thread once it
has read the version's reference: reading 10,000 records is not the
prediction's to wait for.
"""

from __future__ import annotations

import atexit
import datetime as dt
import logging
import os
import threading
import time
import weakref
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from service.store.database import Database, transaction
from service.store.drift_tallies import Tally, write_tallies
from service.usecases.drift_reference import Bins, ReferenceCache

log = logging.getLogger(__name__)

HOUR = 3600
MAX_WAITING_ROWS = 10_000


class _Open:
    """One (model, version, hour)'s running counts: per field its name, its
    bin function and its counts (plain lists: the hot path adds one to an
    item, cheaper on a list than on an array)."""

    __slots__ = ("dirty", "fields", "predictions")

    def __init__(self, bins: Bins) -> None:
        self.fields = tuple((b.name, b.bin_of, [0] * b.size) for b in bins)
        self.predictions = 0
        self.dirty = False


Key = tuple[int, int, int]  # model id, version id, hour (seconds since the epoch / 3600)


class DriftTally:
    """This process's drift counts and the thread that flushes them."""

    def __init__(self, database: Database, references: ReferenceCache, flush_seconds: float,
                 clock: Callable[[], float] = time.time) -> None:
        self.writer = os.urandom(16).hex()
        self.references = references
        self.flush_seconds = flush_seconds
        self.dropped = 0  # rows not counted: more were waiting for bins than kept
        self._database = database
        self._clock = clock
        self._lock = threading.Lock()
        self._open: dict[Key, _Open] = {}
        self._waiting: list[tuple[Key, Sequence[Mapping[str, Any]]]] = []
        self._waiting_rows = 0
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._closed = False

    # -- the hot path ------------------------------------------------------
    def observe(self, model_id: int, version_id: int | None,
                rows: Sequence[Mapping[str, Any]]) -> None:
        """Count ``rows`` (validated features) for the model's active version."""
        if version_id is None or self._closed:
            return
        key = (model_id, version_id, int(self._clock()) // HOUR)
        bins = self.references.get(version_id)
        with self._lock:
            if self._thread is None:
                self._start()
            if bins is None:
                if self._waiting_rows + len(rows) > MAX_WAITING_ROWS:
                    self.dropped += len(rows)
                else:
                    self._waiting.append((key, rows))
                    self._waiting_rows += len(rows)
                return
            self._count(key, bins, rows)

    def _count(self, key: Key, bins: Bins, rows: Sequence[Mapping[str, Any]]) -> None:
        tally = self._open.get(key)
        if tally is None:
            tally = self._open[key] = _Open(bins)
        fields = tally.fields
        for row in rows:
            for name, bin_of, counts in fields:
                counts[bin_of(row[name])] += 1
        tally.predictions += len(rows)
        tally.dirty = True

    # -- the flush ---------------------------------------------------------
    def flush(self) -> int:
        """Write every total changed since the last flush; the number of rows written."""
        self._count_waiting()
        with self._lock:
            changed = [(key, _as_tally(key, t)) for key, t in self._open.items() if t.dirty]
            for key, _ in changed:
                self._open[key].dirty = False
        if changed:
            try:
                with transaction(self._database.write) as session:
                    write_tallies(session, self.writer, (tally for _, tally in changed))
            except Exception:
                with self._lock:  # written whole next time
                    for key, _ in changed:
                        if key in self._open:
                            self._open[key].dirty = True
                raise
        hour = int(self._clock()) // HOUR
        with self._lock:  # past hours are written whole: forget them
            for key in [k for k, t in self._open.items() if k[2] < hour and not t.dirty]:
                del self._open[key]
        return len(changed)

    def _count_waiting(self) -> None:
        with self._lock:
            waiting, self._waiting, self._waiting_rows = self._waiting, [], 0
        for key, rows in waiting:
            bins = self.references.load(key[1])
            if bins is not None:
                with self._lock:
                    self._count(key, bins, rows)

    # -- the thread --------------------------------------------------------
    def _start(self) -> None:
        self._thread = threading.Thread(
            target=_flush_until_stopped, args=(weakref.ref(self), self._stop, self.flush_seconds),
            name="keelson-drift-flush", daemon=True)
        self._thread.start()
        atexit.register(_close, weakref.ref(self))

    def close(self, timeout: float = 10.0) -> None:
        """Stop the flush thread and write what is left (idempotent)."""
        if self._closed:
            return
        self._closed = True
        self._stop.set()
        thread = self._thread
        if thread is not None and thread is not threading.current_thread():
            thread.join(timeout)
        try:
            self.flush()
        except Exception:
            log.exception("the last drift flush failed; its counts are lost")


def _as_tally(key: Key, tally: _Open) -> Tally:
    model_id, version_id, hour = key
    return Tally(model_id, version_id, dt.datetime.fromtimestamp(hour * HOUR, dt.UTC),
                 tally.predictions, [list(counts) for _, _, counts in tally.fields])


def _flush_until_stopped(ref: weakref.ref[DriftTally], stop: threading.Event,
                         interval: float) -> None:
    """Flush every ``interval`` until stopped, or until the tally is gone (its
    app was dropped: tests build many)."""
    while not stop.wait(interval):
        tally = ref()
        if tally is None:
            return
        try:
            tally.flush()
        except Exception:
            log.exception("drift flush failed; it is tried again next interval")
        del tally


def _close(ref: weakref.ref[DriftTally]) -> None:
    tally = ref()
    if tally is not None:
        tally.close()
