"""Online training of one leased model: records after the cursor, one step each.

The state in memory is always "the head version plus the records applied
since": a crash loses only that tail, which the next holder re-applies from
the same head, in the same order, to the same weights.

When versions are written (the determinism rule): a version is written when
``records_seen`` reaches a multiple of ``checkpoint_every`` (the chunk is cut
exactly there, whatever the chunk size), when the stream has been idle for
``idle_seconds`` with train records applied since the last version, and when
the worker stops. Count boundaries fall at the same records in every run.
Idle and stop versions fall where timing puts them, but that never changes
the weights: a snapshot holds the whole learner state (weights, optimizer,
encoder, counters), so continuing from it is the same computation as never
having stopped. Only the set of versions differs between runs, not the
weights at any record.
"""

from __future__ import annotations

import logging
import time
from typing import Any

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from engine import EngineError, Learner
from service.store.record_log import RecordChunk, read_after, read_latest_holdout
from service.store.tables import TrainerRow, VersionRow
from service.versions.compare import (
    RECORDS_BEFORE_KEY,
    UNREAD,
    encoder_of,
    measure_active,
    new_active_score,
    read_active_id,
)
from service.versions.decide import PromotionContext, decide
from service.versions.holdout import HoldoutWindow, evaluate, json_metrics
from service.versions.writes import NewVersion, advance_cursor, stop_lineage, write_online_version
from service.worker.faults import ModelFault, clear_fault, load_spec
from service.worker.settings import WorkerSettings
from service.worker.stepping import LineageStopped, Stepper, online_snapshot, warmed_up

__all__ = ["LineageStopped", "OnlineLineage"]

log = logging.getLogger("keelson.worker")


class OnlineLineage(Stepper):
    """One model's online trainer inside this worker (mutable state); the
    stepping itself is :class:`Stepper`'s, which ``keelson replay`` shares."""

    def __init__(
        self,
        model_id: int,
        worker_id: str,
        settings: WorkerSettings,
        reads: sessionmaker[Session],
        writes: sessionmaker[Session],
    ) -> None:
        with reads() as session:  # one read transaction for the whole start
            super().__init__(model_id, load_spec(session, model_id))
            self.worker_id = worker_id
            self.settings = settings
            self.reads, self.writes = reads, writes
            self.head_id: int | None = None
            self.stored_cursor = 0  # trainers.cursor as last written
            self.encoder: str | None = None
            # Train records a lineage's root learned in batch (a retrain) before
            # the learner's own online count began: a version's records_seen is
            # this plus learner.records_seen.
            self.records_before = 0
            self.window = HoldoutWindow(settings.holdout_window)
            self.last_arrival = time.monotonic()
            self._warmup_seen = -1
            # Since when every record is applied and stored (monotonic; None while
            # there is work): the worker lets the lineage go after a while.
            self.settled_since: float | None = None
            # The active version id read with the current chunk (UNREAD outside one).
            self._active_id: Any = UNREAD
            trainer = session.get(TrainerRow, model_id)
            assert trainer is not None
            # A fault left by an earlier try, cleared once this one gets through.
            self.faulted = trainer.fault is not None
            self.head_id = trainer.head_version_id
            if self.head_id is not None:
                head = session.get(VersionRow, self.head_id)
                assert head is not None
                try:
                    self.learner = Learner.from_bytes(head.snapshot)
                except EngineError as exc:
                    raise ModelFault(f"the head version {head.number} cannot be loaded: "
                                     f"{exc}", head_id=head.id) from None
                self.encoder = encoder_of(self.learner) or f"version:{head.id}"
                self.records_before = int(self.learner.extra.get(RECORDS_BEFORE_KEY, 0))
                self.cursor = self.stored_cursor = trainer.cursor
                self._fill_window(session)
            self._start_settings(session)
        self.active = new_active_score(self.spec)
        training = self.spec.get("training", {})
        self.checkpoint_every = int(training.get("checkpoint_every", 1000))
        self.warmup_records = int(training.get("warmup_records", 256))

    # ------------------------------------------------------------------ stepping
    def step(self) -> bool:
        """Apply the next chunk (or wait for warm-up); True when work was done."""
        if self.learner is None:
            return self._warm_up()
        with self.reads() as session:
            chunk = read_after(session, self.model_id, self.cursor, self.settings.chunk_records)
            if len(chunk):  # a change made before these records committed is seen here
                self._read_changes(session)
            if self._reaches_a_version(chunk):
                # In this transaction rather than one more per version.
                self._active_id = read_active_id(session, self.model_id)
        if not len(chunk):
            if time.monotonic() - self.last_arrival >= self.settings.idle_seconds:
                self.flush()
            if not self.pending_train and self.cursor == self.stored_cursor:
                self._clear_fault()  # all applied and stored: nothing left to fail
                if self.settled_since is None:
                    self.settled_since = time.monotonic()
            return False
        self.last_arrival = time.monotonic()
        self.settled_since = None
        try:
            self._apply(chunk)
        finally:
            self._active_id = UNREAD
        return True

    def _reaches_a_version(self, chunk: RecordChunk) -> bool:
        """Whether applying ``chunk`` will write a count-based version that
        needs a promotion decision."""
        assert self.learner is not None
        if self.spec.get("promotion", "auto") != "auto" or not len(chunk):
            return False
        to_boundary = self.checkpoint_every - self.learner.records_seen % self.checkpoint_every
        return int(np.count_nonzero(chunk.is_train)) >= to_boundary

    def flush(self) -> None:
        """Write a version for train records applied since the last one (or,
        when only holdout records passed, just move the stored cursor)."""
        if self.learner is None:
            return
        if self.pending_train:
            self._write_version()
        elif self.cursor != self.stored_cursor:
            advance_cursor(self.writes, self.model_id, self.worker_id, self.head_id, self.cursor)
            self.stored_cursor = self.cursor
            self.faulted = False  # cleared in that transaction

    def _clear_fault(self) -> None:
        if self.faulted:
            clear_fault(self.writes, self.model_id, self.worker_id)
            self.faulted = False

    def _holdout(self, X: np.ndarray, Y: np.ndarray) -> None:
        self.active.update(X, Y, *self.window.extend(X, Y))

    def _checkpoint(self) -> None:
        self._write_version()

    def _stop(self, error: str) -> None:
        log.error("model %s: lineage stopped: %s", self.model_id, error)
        stop_lineage(self.writes, self.model_id, self.worker_id, self.head_id, error)
        raise LineageStopped(error)

    # ------------------------------------------------------------------ versions
    def _write_version(self) -> None:
        learner = self.learner
        assert learner is not None
        snapshot = online_snapshot(learner, cursor=self.cursor, encoder=self.encoder,
                                   records_before=self.records_before, model_id=self.model_id)
        metrics: dict[str, Any] = {
            "prequential": json_metrics(learner.prequential_metrics()),
            "holdout": evaluate(learner, self.window),
            "holdout_window": self.settings.holdout_window,
        }
        active_id, active_metrics = measure_active(
            self.writes, self.model_id, self.spec, self.window, self.encoder, self.cursor,
            self.settings.holdout_window, self.active, self._active_id)
        promotion = decide(PromotionContext(self.spec, metrics, active_id, active_metrics))
        new = NewVersion(snapshot=snapshot, origin="online", cursor=self.cursor,
                         records_seen=self.records_before + learner.records_seen,
                         metrics=metrics,
                         parent_id=self.head_id, settings_from_seq=self.settings_from_seq)
        version = write_online_version(self.writes, self.model_id, self.worker_id,
                                       self.head_id, new, promotion)
        if version.status == "active":
            # The version's state, frozen: the live learner moves on.
            self.active.start(version.id, Learner.from_bytes(snapshot), metrics["holdout"])
            if self._active_id is not UNREAD:
                self._active_id = version.id
        self.head_id = version.id
        self.stored_cursor = self.cursor
        self.pending_train = 0
        self.faulted = False  # cleared in the version's transaction
        log.info("model %s: version %s at record %s (%s seen)%s", self.model_id,
                 version.number, self.cursor, learner.records_seen,
                 " promoted" if version.status == "active" else "")

    # ------------------------------------------------------------------ warm-up
    def _warm_up(self) -> bool:
        """Create the lineage's first learner once ``warmup_records`` train
        records exist, or fewer once the stream has been idle a while.

        ``warmup_records: 0`` means no warm-up: the learner is created at the
        first train record, its numeric fields encoded from their declared
        bounds or as they come (the engine's policy for a field without
        warm-up values), so a model that asks for none still trains."""
        with self.reads() as session:
            rows = read_after(session, self.model_id, 0, max(self.warmup_records, 1),
                              split="train")
        if len(rows) != self._warmup_seen:
            self._warmup_seen = len(rows)
            self.last_arrival = time.monotonic()
        idle = time.monotonic() - self.last_arrival >= self.settings.idle_seconds
        if not len(rows) or (len(rows) < self.warmup_records and not idle):
            self._clear_fault()  # waiting for records: nothing failed
            return False
        self.learner, self.encoder = warmed_up(self.spec, self.model_id, rows,
                                               self.warmup_records)
        log.info("model %s: network created, encoding from %s warm-up records",
                 self.model_id, min(len(rows), self.warmup_records))
        self.cursor = self.stored_cursor = 0
        self.last_arrival = time.monotonic()
        return True

    def _fill_window(self, session: Session) -> None:
        assert self.learner is not None
        rows = read_latest_holdout(session, self.model_id, self.cursor,
                                   self.settings.holdout_window)
        if not len(rows):
            return
        try:
            self.window.extend(self.learner.encode(rows.features),
                               self.learner.encode_labels(rows.labels))
        except EngineError as exc:
            raise ModelFault(f"holdout records {rows.seqs[0]}..{rows.seqs[-1]} cannot be "
                             f"encoded: {exc}", head_id=self.head_id) from None
