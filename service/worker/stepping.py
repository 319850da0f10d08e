"""The one way records become online steps: a lineage's learner, the records
after its cursor, and its settings changes applied at their positions.

The worker's lineage (lineage.py) and ``keelson replay`` (replay.py) both
step through this class, so a replay is the worker's computation, not a copy
of it. What only the worker does (the holdout window, the active version's
score, writing versions, stopping the lineage) are the hooks a subclass fills
in; a replay leaves them empty.

Every cut of the records (chunks, version boundaries, settings positions)
leaves the weights as they would be uncut: the engine steps one record at a
time, and a settings change is a :meth:`Learner.retune` between two records.
"""

from __future__ import annotations

import logging
from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from engine import EngineError, Learner, NonFiniteError
from service.store.model_events import created_settings, settings_changes
from service.store.record_log import RecordChunk
from service.versions.compare import ENCODER_KEY, RECORDS_BEFORE_KEY
from service.worker.faults import ModelFault

log = logging.getLogger("keelson.worker")

# A settings change: (event id, at_seq, settings as from that position).
Change = tuple[int, int, dict[str, Any]]


class LineageStopped(Exception):
    """The lineage hit a non-finite step and was stopped (``trainers.error``)."""


def online_snapshot(learner: Learner, *, cursor: int, encoder: str | None,
                    records_before: int, model_id: int) -> bytes:
    """The snapshot bytes of an online version (the worker's and a replay's)."""
    return learner.to_bytes(extra={"cursor": cursor, ENCODER_KEY: encoder,
                                   RECORDS_BEFORE_KEY: records_before, "model_id": model_id})


def warmed_up(spec: dict[str, Any], model_id: int, rows: RecordChunk,
              warmup_records: int) -> tuple[Learner, str]:
    """A lineage's first learner, its encoding fixed by the first
    ``warmup_records`` of the train records ``rows``, and the name of that
    encoding (``warmup:{model}:{last warm-up record}``, which a replay reads)."""
    used = rows.features[:warmup_records], rows.labels[:warmup_records]
    try:
        learner = Learner.create(spec, warmup=used[0], warmup_labels=used[1])
    except EngineError as exc:
        raise ModelFault("the network cannot be created from the spec and warm-up "
                         f"records: {exc}") from None
    last = int(rows.seqs[len(used[0]) - 1]) if used[0] else 0
    return learner, f"warmup:{model_id}:{last}"


class Stepper:
    """A learner stepping through a model's records, settings applied in place."""

    def __init__(self, model_id: int, spec: dict[str, Any]) -> None:
        self.model_id = model_id
        self.spec = spec
        self.learner: Learner | None = None
        self.cursor = 0  # last record applied or scored, in memory
        self.pending_train = 0  # train records applied since the last version
        # Settings changes not yet reached, each applied just before the first
        # record after its at_seq.
        self._pending: list[Change] = []
        self._last_change_id = 0
        # The position of the settings in use (None: a model without a history).
        self.settings_from_seq: int | None = None
        self.checkpoint_every = int(spec.get("training", {}).get("checkpoint_every", 1000))

    # ------------------------------------------------------------------ hooks
    def _holdout(self, X: np.ndarray, Y: np.ndarray) -> None:
        """Holdout records passed at the cursor (the worker scores them)."""

    def _checkpoint(self) -> None:
        """``records_seen`` reached a multiple of ``checkpoint_every``."""

    def _stop(self, error: str) -> None:
        raise LineageStopped(error)

    # --------------------------------------------------------------- stepping
    def _apply(self, chunk: RecordChunk) -> None:
        learner = self.learner
        assert learner is not None
        try:
            X = learner.encode(chunk.features)
            Y = learner.encode_labels(chunk.labels)
        except EngineError:
            raise self._unencodable(chunk) from None
        self._apply_encoded(chunk.seqs, chunk.is_train, X, Y)

    def _apply_encoded(self, seqs: np.ndarray, is_train: np.ndarray, X: np.ndarray,
                       Y: np.ndarray) -> None:
        """Step records already encoded with the learner's encoder (which a
        lineage never changes), in sequence order."""
        learner = self.learner
        assert learner is not None
        start = 0
        while start < len(seqs):
            self._settle(int(seqs[start]))
            stop = self._segment_end(is_train, start)
            if self._pending:  # the next change cuts the segment after its at_seq
                stop = min(stop, start + int(np.searchsorted(
                    seqs[start:], self._pending[0][1], side="right")))
            train = is_train[start:stop]
            X_part, Y_part = X[start:stop], Y[start:stop]
            if train.all():
                self._learn(X_part, Y_part, seqs[start:stop])
            else:
                self._learn(X_part[train], Y_part[train], seqs[start:stop][train])
                self._holdout(X_part[~train], Y_part[~train])
            self.cursor = int(seqs[stop - 1])
            start = stop
            if self.pending_train and learner.records_seen % self.checkpoint_every == 0:
                self._checkpoint()

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
