"""Rebuilding a version from the record log and the model's history.

docs/architecture.md, invariant 2: a version is a function of the records up
to its cursor and of the model's history. This module computes that function
again, with the worker's own code, and returns the snapshot bytes it gives
(:func:`rebuild_snapshot`); comparing them with the stored snapshot is
engine/snapshot_diff.py's, and ``keelson replay`` (service/tools/replay.py)
puts the two together. The rebuild needs no stored snapshot of the version,
so it can also restore one that was pruned.

A version is rebuilt from where its lineage starts:

* an online version: walk its parents back to the lineage's root, either a
  retrain version (rebuilt first, as below) or the first version of a
  warm-up lineage (a new learner from the first train records, as the worker
  made it). Then the train records after the root's cursor, up to the
  version's, in sequence order, a chunk per query, stepped by
  :class:`~service.worker.stepping.Stepper` with every settings change
  applied at its position, exactly as the worker steps them;
* a retrain version: its job's parameters (a warm start rebuilds the version
  it started from), the settings in effect when the job read them, and the
  train records up to its cursor, fitted by the worker's ``fit_retrain``.

Holdout records never change a learner (they are only scored), so only train
records are read. A lineage's root is taken through its snapshot bytes
(``Learner.from_bytes``), as the worker takes a head.

Records forgotten since (deleted rows) are found from the log itself before
any work: a version's ``records_seen`` counts every train record at or
below its cursor, so fewer rows there means some are gone
(:class:`RecordsForgotten`).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from engine import Learner, snapshot
from service.store.model_events import created_settings, settings_changes
from service.store.record_log import count_records, iter_chunks, read_after
from service.store.tables import JobRow, ModelEventRow, VersionRow
from service.versions.compare import ENCODER_KEY, RECORDS_BEFORE_KEY, encoder_of
from service.worker.faults import load_spec
from service.worker.replay_reader import PIPELINE_MIN_RECORDS, ReadAhead, Unencodable
from service.worker.retrain import (
    RetrainStart,
    fit_retrain,
    fresh_retrain,
    retrain_snapshot,
    warm_retrain,
)
from service.worker.stepping import Stepper, online_snapshot, warmed_up

# (records stepped so far, records to step) of an online stretch, or
# (epoch, max epochs) of a retrain's fit; the label says which.
Progress = Callable[[str, int, int], None]


class CannotReplay(Exception):
    """The version cannot be rebuilt from this installation's records (it was
    restored from a file, or its lineage's start is gone); says why."""


class RecordsForgotten(Exception):
    """Train records the version learned are no longer in the log."""

    def __init__(self, number: int, seen: int, found: int, cursor: int) -> None:
        self.number, self.seen, self.found, self.cursor = number, seen, found, cursor
        self.missing = seen - found
        super().__init__(
            f"version {number} learned {seen} train records at or below record {cursor}; "
            f"{found} are stored: {self.missing} were forgotten, so it cannot be rebuilt "
            "as it was")


@dataclass(frozen=True)
class Step:
    """A version as the rebuild reads it (no snapshot loaded)."""

    id: int
    number: int
    origin: str
    cursor: int
    records_seen: int
    parent_id: int | None
    job_id: int | None
    settings_from_seq: int | None


_COLUMNS = (VersionRow.id, VersionRow.number, VersionRow.origin, VersionRow.cursor,
            VersionRow.records_seen, VersionRow.parent_id, VersionRow.job_id,
            VersionRow.settings_from_seq)


def read_step(session: Session, version_id: int) -> Step:
    row = session.execute(select(*_COLUMNS).where(VersionRow.id == version_id)).one()
    return Step(*row)


def check_records(session: Session, model_id: int, version: Step) -> int:
    """The number of train records the version's rebuild reads;
    RecordsForgotten when fewer are stored than it learned."""
    found = count_records(session, model_id, upto=version.cursor, split="train")
    if found < version.records_seen:
        raise RecordsForgotten(version.number, version.records_seen, found, version.cursor)
    return found


def rebuild_snapshot(reads: sessionmaker[Session], model_id: int, version_id: int,
                     chunk_records: int, progress: Progress | None = None,
                     read_ahead_from: int | None = None) -> bytes:
    """The snapshot bytes version ``version_id`` of ``model_id`` would hold if
    it were made again from the stored records and history (see the module
    docstring). RecordsForgotten, CannotReplay, or what the worker would
    have failed with. ``read_ahead_from``: the train records from which a
    second process reads ahead (replay_reader.py; None: its default)."""
    ahead = PIPELINE_MIN_RECORDS if read_ahead_from is None else read_ahead_from
    with reads() as session:
        target = read_step(session, version_id)
        chain = [target]
        while chain[-1].origin == "online" and chain[-1].parent_id is not None:
            chain.append(read_step(session, chain[-1].parent_id))
        root = chain[-1]
        if root.origin == "online" and root.cursor == 0:  # no record of ours taught it
            raise CannotReplay(f"version {target.number} descends from version "
                               f"{root.number}, which was restored from a file, not "
                               "learned from this installation's records")
        check_records(session, model_id, target)
    if root.origin == "retrain":
        start = _rebuild_retrain(reads, model_id, root, chunk_records, progress, ahead)
        if root is target:
            return start
        return _online(reads, model_id, (root.id, Learner.from_bytes(start)), root.cursor,
                       target, chunk_records, progress, ahead)
    return _online(reads, model_id, None, 0, target, chunk_records, progress, ahead)


class _Replay(Stepper):
    """The worker's stepping with nothing written: holdout records are not
    read, no version is written, and a non-finite step ends the replay."""


def _online(reads: sessionmaker[Session], model_id: int, head: tuple[int, Learner] | None,
            after: int, target: Step, chunk_records: int,
            progress: Progress | None, ahead: int) -> bytes:
    """Step the train records in (after, target.cursor] from ``head`` (the
    root version's id and learner; None: a warm-up lineage's start) and return
    the target's snapshot bytes."""
    learner = None if head is None else head[1]
    with reads() as session:
        stepper = _Replay(model_id, load_spec(session, model_id))
        stepper.cursor = after
        stepper.learner = learner
        stepper._start_settings(session)
        if learner is None:
            warmup = int(stepper.spec["training"].get("warmup_records", 256))
            stepper.learner, encoder = _warm_up(session, model_id, stepper, target, warmup)
            records_before = 0
        else:
            assert head is not None
            encoder = encoder_of(learner) or f"version:{head[0]}"  # as the worker names it
            records_before = int(learner.extra.get(RECORDS_BEFORE_KEY, 0))
        total = count_records(session, model_id, after=after, upto=target.cursor,
                              split="train")
    label = f"version {target.number}: records {after + 1}..{target.cursor}"
    done = 0
    for seqs in _step(reads, model_id, stepper, after, target.cursor, chunk_records,
                      total >= ahead):
        done += len(seqs)
        if progress is not None:
            progress(label, done, total)
    assert stepper.learner is not None
    return online_snapshot(stepper.learner, cursor=target.cursor, encoder=encoder,
                           records_before=records_before, model_id=model_id)


def _step(reads: sessionmaker[Session], model_id: int, stepper: Stepper, after: int,
          upto: int, chunk_records: int, read_ahead: bool) -> Iterator[NDArray[np.int64]]:
    """Step the train records in (after, upto], yielding each chunk's seqs:
    read inline, or a chunk ahead by a second process for long replays
    (replay_reader.py)."""
    learner = stepper.learner
    assert learner is not None
    if not read_ahead:
        for chunk in iter_chunks(reads, model_id, upto, chunk_records, split="train",
                                 after=after):
            stepper._apply(chunk)
            yield chunk.seqs
        return
    bind = reads.kw["bind"]
    reader = ReadAhead(bind.url.render_as_string(hide_password=False), model_id, upto,
                       chunk_records, learner.spec, learner.encoder.arrays(),
                       learner.encoder.meta())
    try:
        inline = iter_chunks(reads, model_id, upto, chunk_records, split="train", after=after)
        while not reader.ready():  # inline while the reader starts
            part = next(inline, None)
            if part is None:
                return
            stepper._apply(part)
            after = int(part.seqs[-1])
            yield part.seqs
        for seqs, is_train, X, Y in reader.chunks(after):
            stepper._apply_encoded(seqs, is_train, X, Y)
            yield seqs
    except Unencodable as failed:  # step that chunk here: the worker's fault names it
        with reads() as session:
            stepper._apply(read_after(session, model_id, failed.after, chunk_records,
                                      split="train"))
        raise
    finally:
        reader.close()


def _warm_up(session: Session, model_id: int, stepper: Stepper, target: Step,
             warmup: int) -> tuple[Learner, str]:
    """The warm-up lineage's first learner, from the same train records the
    worker took: the first ``warmup`` of them, or fewer when the stream was
    quiet (the lineage's encoding names its last one)."""
    last = _warmup_last(session, model_id, target)
    rows = read_after(session, model_id, 0, max(warmup, 1), split="train")
    if last:  # 0: a lineage without warm-up (warmup_records 0) took none
        keep = int((rows.seqs <= last).sum())
        rows.seqs, rows.is_train = rows.seqs[:keep], rows.is_train[:keep]
        rows.features, rows.labels = rows.features[:keep], rows.labels[:keep]
    if not len(rows):
        raise CannotReplay("the lineage's warm-up records are not stored")
    return warmed_up(stepper.spec, model_id, rows, warmup)


def _warmup_last(session: Session, model_id: int, target: Step) -> int | None:
    """The last warm-up record, as the lineage's encoding names it
    (``warmup:{model}:{seq}``, in every snapshot of the lineage); None
    when no snapshot of the lineage is stored to say (pruned)."""
    step: Step | None = target
    while step is not None:
        data = session.scalar(select(VersionRow.snapshot).where(VersionRow.id == step.id))
        if data is not None:
            name = str(snapshot.load(data)[1].get("extra", {}).get(ENCODER_KEY) or "")
            kind, _, rest = name.partition(":")
            owner, _, last = rest.partition(":")
            if kind != "warmup" or owner != str(model_id):
                raise CannotReplay(f"version {target.number} was not learned from this "
                                   "installation's records (it was restored from a file)")
            return int(last)
        step = read_step(session, step.parent_id) if step.parent_id is not None else None
    return None


def _rebuild_retrain(reads: sessionmaker[Session], model_id: int, version: Step,
                     chunk_records: int, progress: Progress | None, ahead: int) -> bytes:
    """A retrain version's snapshot: its job's start, the batch fit, the bytes."""
    with reads() as session:
        job = session.get(JobRow, version.job_id) if version.job_id is not None else None
        if job is None or job.model_id != model_id:
            raise CannotReplay(f"version {version.number} has no retrain job of this model "
                               "(it was restored from a file)")
        spec = _spec_of_job(session, model_id, version, job)
        n_train = check_records(session, model_id, version)
        if version.parent_id is None:
            start: RetrainStart = fresh_retrain(
                session, job.id, model_id, spec, version.cursor, n_train,
                bool((job.params or {}).get("warm_start")))
    if version.parent_id is not None:  # a warm start from the version then active
        parent = Learner.from_bytes(rebuild_snapshot(reads, model_id, version.parent_id,
                                                     chunk_records, progress, ahead))
        start = warm_retrain(job.id, model_id, spec, version.cursor, n_train, parent,
                             version.parent_id)
    max_epochs = int(spec["training"].get("max_epochs", 0))
    label = f"version {version.number}: retrain epochs"

    def heard(epoch: int, loss: float, validation_metric: float | None) -> None:
        if progress is not None:
            progress(label, int(epoch), max_epochs)

    fit_retrain(reads, start, chunk_records, heard)
    return retrain_snapshot(start)


def _spec_of_job(session: Session, model_id: int, version: Step, job: JobRow) -> dict[str, Any]:
    """The spec the job read when it started: the stored spec with the
    settings of the last change made before then (its position is the
    version's ``settings_from_seq``), or those it was created with."""
    spec = load_spec(session, model_id)
    changes = settings_changes(session, model_id)
    made = dict(session.execute(
        select(ModelEventRow.id, ModelEventRow.created_at)
        .where(ModelEventRow.id.in_([change[0] for change in changes]))).all())
    upto = version.settings_from_seq or 0
    before = [change for change in changes if change[1] <= upto
              and (job.started_at is None or made[change[0]] <= job.started_at)]
    settings = before[-1][2] if before else created_settings(session, model_id)
    return {**spec, **settings} if settings is not None else spec
