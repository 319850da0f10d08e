"""Retrain jobs: the engine's batch trainer over every train record, as a version.

A job is claimed with a lease and run on its own thread (job_runner.py). The
train records at or before the job's cursor (the last record stored when it
started) are streamed from the database a chunk per query, encoded, and
appended to a temporary file of encoded rows (encoded_file.py); the engine's
batch trainer then reads its epochs from that file a block at a time
(engine/rows.py), so the worker's memory does not grow with the record count
(docs/architecture.md, "Retraining over millions of records"). The holdout
window it is scored on is read a chunk at a time too.

From scratch, the encoder's statistics come from an evenly spread sample of
the train records (at most ``STATS_SAMPLE`` rows: enough for a mean and a
spread, and bounded whatever the record count); a warm start keeps the active
version's encoder and weights.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session, sessionmaker

from engine import Learner, TrainingCancelled
from service.store.model_events import settings_changes
from service.store.record_log import (
    RecordChunk,
    count_records,
    fetch_chunk,
    iter_chunks,
    last_seq,
    latest_chunks,
    record_columns,
)
from service.store.tables import JobRow, RecordRow, VersionRow
from service.versions.compare import (
    ENCODER_KEY,
    RECORDS_BEFORE_KEY,
    encoder_of,
    measure_active,
    new_active_score,
    read_active_id,
)
from service.versions.decide import PromotionContext, decide
from service.versions.holdout import (
    HOLDOUT_CHUNK,
    HoldoutWindow,
    evaluate,
    fill_window,
    json_metrics,
)
from service.versions.writes import NewVersion, write_retrain_version
from service.worker.encoded_file import EncodedRowsFile
from service.worker.faults import ModelFault, load_spec
from service.worker.jobs import report_progress
from service.worker.settings import WorkerSettings

log = logging.getLogger("keelson.worker")

STATS_SAMPLE = 10_000


def run_retrain(
    settings: WorkerSettings,
    reads: sessionmaker[Session],
    writes: sessionmaker[Session],
    job_id: int,
    worker_id: str,
    cancel: Any = lambda: False,
) -> VersionRow:
    """Run one claimed retrain job to its version (callable directly in tests)."""
    with reads() as session:
        job = session.get(JobRow, job_id)
        assert job is not None
        model_id = job.model_id
        spec = load_spec(session, model_id)  # ModelFault: the job fails saying why
        # The spec's settings are the latest change's (0: as created).
        changes = settings_changes(session, model_id)
        settings_from_seq = changes[-1][1] if changes else 0
        active_version_id = read_active_id(session, model_id)
        warm_start = bool((job.params or {}).get("warm_start"))
        cursor = last_seq(session, model_id)
        n_train = count_records(session, model_id, upto=cursor, split="train")
        active = session.get(VersionRow, active_version_id) if (
            warm_start and active_version_id) else None
        if n_train == 0:
            raise ModelFault("the model has no train records to retrain on")
        if active is not None:
            if active.snapshot is None:  # retention never prunes an active version
                raise ModelFault(f"the active version {active.number} has no snapshot (pruned)")
            learner = Learner.from_bytes(active.snapshot)
            start = warm_retrain(job_id, model_id, spec, cursor, n_train, learner, active.id)
        else:
            start = fresh_retrain(session, job_id, model_id, spec, cursor, n_train, warm_start)

    reporter = _ProgressReporter(writes, job_id, worker_id, settings.progress_seconds,
                                 int(spec.get("training", {}).get("max_epochs", 0)))
    report = fit_retrain(reads, start, settings.chunk_records, reporter, cancel)
    reporter.flush()
    learner, encoder, parent_id = start.learner, start.encoder, start.parent_id

    window = HoldoutWindow(settings.holdout_window)
    with reads() as session:
        fill_window(window, learner, latest_chunks(session, model_id, cursor,
                                                   settings.holdout_window, HOLDOUT_CHUNK))
    metrics = {
        "prequential": json_metrics(learner.prequential_metrics()),
        "holdout": evaluate(learner, window),
        "holdout_window": settings.holdout_window,
        "fit": _plain(report),
    }
    active_id, active_metrics = measure_active(
        writes, model_id, spec, window, encoder, cursor, settings.holdout_window,
        new_active_score(spec))
    promotion = decide(PromotionContext(spec, metrics, active_id, active_metrics))
    snapshot = retrain_snapshot(start)
    new = NewVersion(snapshot=snapshot, origin="retrain", cursor=cursor,
                     records_seen=n_train, metrics=metrics,
                     parent_id=parent_id, job_id=job_id,
                     settings_from_seq=settings_from_seq)
    version = write_retrain_version(writes, job_id, worker_id, new, promotion)
    log.info("job %s: version %s of model %s (%s)", job_id, version.number, model_id,
             version.status)
    return version


@dataclass
class RetrainStart:
    """What a retrain fits from: the job, the spec as it was, the records up
    to ``cursor`` (``n_train`` of them train), and the learner it starts
    with (a fresh network, or the active version's for a warm start)."""

    job_id: int
    model_id: int
    spec: dict[str, Any]
    cursor: int
    n_train: int
    learner: Learner
    encoder: str | None
    parent_id: int | None
    warm_start: bool


def warm_retrain(job_id: int, model_id: int, spec: dict[str, Any], cursor: int,
                 n_train: int, active: Learner, active_id: int) -> RetrainStart:
    """A warm start from the active version's learner (a retrain fits with
    the settings of the moment)."""
    active.retune(spec["training"])
    return RetrainStart(job_id, model_id, spec, cursor, n_train, active, encoder_of(active),
                        active_id, warm_start=True)


def fresh_retrain(session: Session, job_id: int, model_id: int, spec: dict[str, Any],
                  cursor: int, n_train: int, warm_start: bool = False) -> RetrainStart:
    """From scratch: the encoder's statistics from a sample of the train records
    (``warm_start``: the job asked for one, but no version was active; the fit
    then starts from this fresh network, the same weights as from scratch)."""
    sample = _stats_sample(session, model_id, cursor, n_train)
    learner = Learner.create(spec, warmup=sample.features, warmup_labels=sample.labels)
    return RetrainStart(job_id, model_id, spec, cursor, n_train, learner,
                        f"retrain:{job_id}", None, warm_start=warm_start)


def fit_retrain(reads: sessionmaker[Session], start: RetrainStart, chunk_records: int,
                progress: Any = None, cancel: Any = lambda: False) -> Any:
    """The batch fit of a retrain over every train record up to its cursor
    (the worker's job and ``keelson replay`` both run this); the fit report."""
    started = time.perf_counter()
    with _load_train(reads, start.learner, start.model_id, start.cursor, start.n_train,
                     chunk_records, cancel) as rows:
        loaded = time.perf_counter()
        report = start.learner.fit_rows(rows, progress=progress, cancel=cancel,
                                        warm_start=start.warm_start)
    log.info("job %s: %s train records loaded in %.2f s, fitted in %.2f s (%s epochs)",
             start.job_id, start.n_train, loaded - started, time.perf_counter() - loaded,
             report.epochs)
    return report


def retrain_snapshot(start: RetrainStart) -> bytes:
    """The snapshot bytes of a retrain's version, once fitted."""
    learner = start.learner
    # The version has learned from every train record up to its cursor.
    records_before = start.n_train - learner.records_seen
    return learner.to_bytes(extra={"cursor": start.cursor, ENCODER_KEY: start.encoder,
                                   RECORDS_BEFORE_KEY: records_before,
                                   "model_id": start.model_id, "job_id": start.job_id})


def _load_train(reads: sessionmaker[Session], learner: Learner, model_id: int, cursor: int,
                n_train: int, chunk_records: int, cancel: Any) -> EncodedRowsFile:
    """Every train record up to the cursor, encoded a chunk at a time into a
    temporary file of rows (the caller closes it)."""
    rows: EncodedRowsFile | None = None
    try:
        for chunk in iter_chunks(reads, model_id, cursor, chunk_records, split="train"):
            if cancel():
                raise TrainingCancelled("stopped while loading records")
            X_part = learner.encode(chunk.features)
            Y_part = learner.encode_labels(chunk.labels)
            if rows is None:
                rows = EncodedRowsFile(n_train, X_part.shape[1], Y_part.dtype)
            rows.append(X_part, Y_part)
        if rows is None or len(rows) != n_train:
            # Records at or before the cursor are all committed (docs/architecture.md,
            # invariant 1); they go only with the model, or by a forget, which
            # queues this job again (this attempt's writes are fenced).
            raise RuntimeError(f"expected {n_train} train records, read "
                               f"{0 if rows is None else len(rows)}")
    except BaseException:
        if rows is not None:
            rows.close()
        raise
    return rows


def _stats_sample(session: Session, model_id: int, cursor: int, n_train: int) -> RecordChunk:
    """Every k-th train record up to the cursor, at most STATS_SAMPLE rows."""
    every = max(1, math.ceil(n_train / STATS_SAMPLE))
    numbered = (
        select(RecordRow.seq, func.row_number().over(order_by=RecordRow.seq).label("n"))
        .where(RecordRow.model_id == model_id, RecordRow.seq <= cursor,
               RecordRow.split == "train")
        .subquery()
    )
    return fetch_chunk(
        session,
        select(*record_columns(session))
        .join(numbered, numbered.c.seq == RecordRow.seq)
        .where((numbered.c.n - 1) % every == 0)
        .order_by(RecordRow.seq),
    )


class _ProgressReporter:
    """The fit's progress callback: writes {epoch, loss, validation_metric}
    to the job row at most once per ``every`` seconds (and the last one)."""

    def __init__(self, writes: sessionmaker[Session], job_id: int, worker_id: str,
                 every: float, max_epochs: int) -> None:
        self.writes, self.job_id, self.worker_id = writes, job_id, worker_id
        self.every, self.max_epochs = every, max_epochs
        self._last_write = 0.0
        self._pending: dict[str, Any] | None = None

    def __call__(self, epoch: int, loss: float, validation_metric: float | None) -> None:
        self._pending = {"epoch": int(epoch), "max_epochs": self.max_epochs,
                         "loss": _finite_or_none(loss),
                         "validation_metric": _finite_or_none(validation_metric)}
        if time.monotonic() - self._last_write >= self.every:
            self.flush()

    def flush(self) -> None:
        if self._pending is not None:
            report_progress(self.writes, self.job_id, self.worker_id, self._pending)
            self._last_write = time.monotonic()
            self._pending = None


def _finite_or_none(value: float | None) -> float | None:
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _plain(report: Any) -> dict[str, Any]:
    """The fit report as JSON-ready values."""
    is_instance = dataclasses.is_dataclass(report) and not isinstance(report, type)
    fields = dataclasses.asdict(report) if is_instance else dict(vars(report))
    plain: dict[str, Any] = {}
    for key, value in fields.items():
        if isinstance(value, np.generic):
            value = value.item()
        if isinstance(value, float) and not math.isfinite(value):
            value = None
        if isinstance(value, int | float | str | bool) or value is None:
            plain[key] = value
    return plain
