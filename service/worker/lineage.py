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

from engine import EngineError, Learner, NonFiniteError
from service.store.model_events import created_settings, settings_changes
from service.store.record_log import RecordChunk, read_after, read_latest_holdout
from service.store.tables import TrainerRow, VersionRow
from service.versions.compare import (
    ENCODER_KEY,
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

log = logging.getLogger("keelson.worker")


class LineageStopped(Exception):
    """The lineage hit a non-finite step and was stopped (``trainers.error``)."""


class OnlineLineage:
    """One model's online trainer inside this worker (mutable state)."""

    def __init__(
        self,
        model_id: int,
        worker_id: str,
        settings: WorkerSettings,
        reads: sessionmaker[Session],
        writes: sessionmaker[Session],
    ) -> None:
        self.model_id = model_id
        self.worker_id = worker_id
        self.settings = settings
        self.reads, self.writes = reads, writes
        self.learner: Learner | None = None
        self.head_id: int | None = None
        self.cursor = 0  # last record applied or scored, in memory
        self.stored_cursor = 0  # trainers.cursor as last written
        self.pending_train = 0  # train records applied since the head version
        self.encoder: str | None = None
        # Train records a lineage's root learned in batch (a retrain) before
        # the learner's own online count began: a version's records_seen is
        # this plus learner.records_seen.
        self.records_before = 0
        self.window = HoldoutWindow(settings.holdout_window)
        self.last_arrival = time.monotonic()
        self._warmup_seen = -1
        # The active version id read with the current chunk (UNREAD outside one).
        self._active_id: Any = UNREAD
        # Settings changes not yet reached: (event id, at_seq, settings), each
        # applied just before the first record after its at_seq.
        self._pending: list[tuple[int, int, dict[str, Any]]] = []
        self._last_change_id = 0
        # The position of the settings in use (None: a model without a history).
        self.settings_from_seq: int | None = None
        with reads() as session:
            self.spec: dict[str, Any] = load_spec(session, model_id)
            trainer = session.get(TrainerRow, model_id)
            assert trainer is not None
            # A fault left by an earlier try, cleared once this one gets through.
            self.faulted = trainer.fault is not None
            self.head_id = trainer.head_version_id
            if self.head_id is not None:
                head = session.get(VersionRow, self.head_id)
                assert head is not None
                if head.snapshot is None:  # retention never prunes a head: a fault if it was
                    raise ModelFault(f"the head version {head.number} has no snapshot (pruned)",
                                     head_id=head.id)
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
            return False
        self.last_arrival = time.monotonic()
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

    def _apply(self, chunk: RecordChunk) -> None:
        learner = self.learner
        assert learner is not None
        try:
            X = learner.encode(chunk.features)
            Y = learner.encode_labels(chunk.labels)
        except EngineError:
            raise self._unencodable(chunk) from None
        start = 0
        while start < len(chunk):
            self._settle(int(chunk.seqs[start]))
            stop = self._segment_end(chunk.is_train, start)
            if self._pending:  # the next change cuts the segment after its at_seq
                stop = min(stop, start + int(np.searchsorted(
                    chunk.seqs[start:], self._pending[0][1], side="right")))
            train = chunk.is_train[start:stop]
            X_part, Y_part = X[start:stop], Y[start:stop]
            if train.all():
                self._learn(X_part, Y_part, chunk.seqs[start:stop])
            else:
                self._learn(X_part[train], Y_part[train], chunk.seqs[start:stop][train])
                X_in, Y_in = X_part[~train], Y_part[~train]
                self.active.update(X_in, Y_in, *self.window.extend(X_in, Y_in))
            self.cursor = int(chunk.seqs[stop - 1])
            start = stop
            if self.pending_train and learner.records_seen % self.checkpoint_every == 0:
                self._write_version()

    def _unencodable(self, chunk: RecordChunk) -> ModelFault:
        """The fault naming the first record of ``chunk`` that does not encode
        (found record by record: only a failure pays for it)."""
        assert self.learner is not None
        for seq, features, label in zip(chunk.seqs, chunk.features, chunk.labels,
                                        strict=True):
            try:
                self.learner.encode([features])
                self.learner.encode_labels([label])
            except EngineError as exc:
                reason = str(exc).removeprefix("row 0: ")
                return ModelFault(f"record {seq} cannot be encoded: {reason}")
        return ModelFault(f"records {chunk.seqs[0]}..{chunk.seqs[-1]} cannot be encoded")

    def _segment_end(self, is_train: np.ndarray, start: int) -> int:
        """End of the run of records that takes ``records_seen`` at most to
        the next multiple of ``checkpoint_every`` (cut just after it)."""
        assert self.learner is not None
        to_boundary = self.checkpoint_every - self.learner.records_seen % self.checkpoint_every
        train_at = np.flatnonzero(is_train[start:])
        if len(train_at) < to_boundary:
            return len(is_train)
        return start + int(train_at[to_boundary - 1]) + 1

    def _learn(self, X: np.ndarray, Y: np.ndarray, seqs: np.ndarray) -> None:
        if not len(X):
            return
        assert self.learner is not None
        try:
            self.learner.learn(X, Y)
        except NonFiniteError as exc:
            self._stop(f"NonFiniteError at record {int(seqs[exc.applied])}: {exc}")
        self.pending_train += len(X)

    def _stop(self, error: str) -> None:
        log.error("model %s: lineage stopped: %s", self.model_id, error)
        stop_lineage(self.writes, self.model_id, self.worker_id, self.head_id, error)
        raise LineageStopped(error)

    # ------------------------------------------------------------------ settings
    def _start_settings(self, session: Session) -> None:
        """Take the settings in effect after the cursor: those of the last
        change at or before it (or the creation's); later changes wait."""
        changes = settings_changes(session, self.model_id)
        if changes:
            self._last_change_id = changes[-1][0]
        in_effect = [change for change in changes if change[1] <= self.cursor]
        settings = in_effect[-1][2] if in_effect else created_settings(session, self.model_id)
        if settings is not None:  # None: a model from before its history, as stored
            self._use_settings(settings, in_effect[-1][1] if in_effect else 0)
        self._pending = [change for change in changes if change[1] > self.cursor]

    def _read_changes(self, session: Session) -> None:
        for change in settings_changes(session, self.model_id, self._last_change_id):
            self._pending.append(change)
            self._last_change_id = change[0]

    def _settle(self, seq: int) -> None:
        """Apply every change that takes effect before record ``seq``."""
        while self._pending and self._pending[0][1] < seq:
            _, at_seq, settings = self._pending.pop(0)
            self._use_settings(settings, at_seq)
            log.info("model %s: settings of record %s on applied", self.model_id, at_seq)

    def _use_settings(self, settings: dict[str, Any], at_seq: int) -> None:
        self.spec = {**self.spec, **settings}
        self.checkpoint_every = int(self.spec["training"]["checkpoint_every"])
        self.settings_from_seq = at_seq
        if self.learner is not None:
            try:  # the same options again change nothing (a head that has them)
                self.learner.retune(self.spec["training"])
            except EngineError as exc:
                raise ModelFault(f"the settings of record {at_seq} on cannot be "
                                 f"applied: {exc}") from None

    # ------------------------------------------------------------------ versions
    def _write_version(self) -> None:
        learner = self.learner
        assert learner is not None
        snapshot = learner.to_bytes(extra={"cursor": self.cursor, ENCODER_KEY: self.encoder,
                                           RECORDS_BEFORE_KEY: self.records_before,
                                           "model_id": self.model_id})
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
        used = rows.features[:self.warmup_records], rows.labels[:self.warmup_records]
        try:
            self.learner = Learner.create(self.spec, warmup=used[0], warmup_labels=used[1])
        except EngineError as exc:
            raise ModelFault("the network cannot be created from the spec and warm-up "
                             f"records: {exc}") from None
        last = int(rows.seqs[len(used[0]) - 1]) if used[0] else 0
        self.encoder = f"warmup:{self.model_id}:{last}"
        log.info("model %s: network created, encoding from %s warm-up records",
                 self.model_id, len(used[0]))
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
