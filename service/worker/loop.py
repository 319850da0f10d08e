"""The worker process: lease models, step their lineages, run jobs, stop cleanly.

One thread steps every leased lineage a chunk at a time, round robin, and
renews the leases between chunks (a chunk takes milliseconds, a lease lasts
seconds). Retrain jobs run one at a time on a second thread (job_runner.py,
retrain.py) so a long retrain does not stall online learning.

Stopping (the ``stop`` event, set on SIGTERM/SIGINT): the current chunk is
finished, a version is written for every lineage with train records applied
since its last one, the running job is handed back to the queue, and the
leases are released so another worker can take over at once.
"""

from __future__ import annotations

import logging
import os
import socket
import threading
import time
from collections.abc import Mapping
from typing import Any

from sqlalchemy import Engine, select
from sqlalchemy import exc as sa_exc
from sqlalchemy.orm import Session, sessionmaker

from service.config import warn_of_retired
from service.process import stop_on_signals
from service.store.database import make_engine, make_sessionmaker, transaction
from service.store.record_log import decode_json
from service.versions.writes import Fenced
from service.worker.faults import ANY_HEAD, describe, is_expected, log_text, record_fault
from service.worker.job_runner import JobRunner
from service.worker.leasing import (
    claim_trainers,
    ensure_trainer_rows,
    release_trainers,
    renew_trainers,
)
from service.worker.lineage import LineageStopped, OnlineLineage
from service.worker.retention import INTERVAL_SECONDS
from service.worker.settings import WorkerSettings
from service.worker.upkeep import retention_pass

log = logging.getLogger("keelson.worker")
CLAIM_BATCH = 4
# While more models wait to be leased, claim again at once as long as fewer
# than this many lineages had work on the last pass: a backlog of many models
# is taken up in a few passes, not at CLAIM_BATCH per KEELSON_WORKER_CLAIM_SECONDS,
# and a worker takes no more than it can step promptly.
CLAIM_AHEAD = 8
FAULT_LOG = "cannot train"  # how each failed try of one model starts its log line
# Failures that mean the database is away for now (restarting, unreachable).
DATABASE_AWAY = (sa_exc.OperationalError, sa_exc.InterfaceError)


def default_worker_id() -> str:
    return f"{socket.gethostname()}:{os.getpid()}"


def run_worker(
    config: Mapping[str, Any],
    stop: threading.Event | None = None,
    worker_id: str | None = None,
) -> None:
    """Run a training worker until ``stop`` is set.

    ``config`` is the service configuration mapping (service/config.py keys;
    the worker's own keys are listed in service/worker/settings.py). Without a
    ``stop`` event, SIGTERM and SIGINT stop the worker (main thread only; see
    service.process). A stop requested before the loop starts, while the
    process was still loading, ends it at once: nothing was leased, nothing
    is written, and the exit is a clean one.
    """
    settings = WorkerSettings.from_config(config)
    warn_of_retired()
    if stop is None:
        main_thread = threading.current_thread() is threading.main_thread()
        stop = stop_on_signals() if main_thread else threading.Event()
    name = worker_id or default_worker_id()
    if stop.is_set():
        log.info("worker %s: stopped while starting; nothing to do", name)
        return
    engine = make_engine(settings.database_url, json_deserializer=decode_json)
    try:
        Worker(settings, engine, name, stop).run()
    finally:
        engine.dispose()


class Worker:
    def __init__(self, settings: WorkerSettings, engine: Engine, worker_id: str,
                 stop: threading.Event) -> None:
        self.settings = settings
        self.worker_id = worker_id
        self.stop = stop
        self.reads: sessionmaker[Session] = make_sessionmaker(engine)
        self.writes: sessionmaker[Session] = make_sessionmaker(engine, write=True)
        self.lineages: dict[int, OnlineLineage] = {}
        self.jobs = JobRunner(settings, self.reads, self.writes, worker_id, stop)
        self._next_heartbeat = 0.0
        self._next_claim = 0.0
        self._next_retention = 0.0
        self._database_away = False
        self._more_waiting = False  # the last claim filled its batch
        self._working = 0  # lineages that had work on the last pass

    def run(self) -> None:
        log.info("worker %s started", self.worker_id)
        try:
            while not self.stop.is_set():
                busy = self._tick()
                if not busy:
                    self.stop.wait(self.settings.poll_seconds)
        finally:
            self._shutdown()
        log.info("worker %s stopped", self.worker_id)

    def _tick(self) -> bool:
        now = time.monotonic()
        answered = False  # whether a bookkeeping query reached the database
        try:
            if now >= self._next_heartbeat:
                self._heartbeat()
                self._next_heartbeat = now + self.settings.heartbeat_seconds
                answered = True
            if now >= self._next_claim or (self._more_waiting and self._working < CLAIM_AHEAD):
                self._claim()
                self._next_claim = now + self.settings.claim_seconds
                answered = True
            answered = self.jobs.poll() or answered
            if now >= self._next_retention:
                self._retention(now)
                answered = True
        except DATABASE_AWAY as exc:
            # Said once, not a traceback per poll; keep trying, keep the state.
            if not self._database_away:
                log.warning("worker %s: database unavailable (%s); waiting for it",
                            self.worker_id, type(exc.orig or exc).__name__)
                self._database_away = True
            return False
        except Exception:
            log.exception("worker %s: lease bookkeeping failed", self.worker_id)
            return False
        if self._database_away and answered:
            # Only an answer proves it: a tick with nothing due asked nothing.
            log.info("worker %s: database reachable again", self.worker_id)
            self._database_away = False
        busy = False
        working = 0
        for model_id, lineage in list(self.lineages.items()):
            if self.stop.is_set():
                break
            try:
                stepped = lineage.step()
                working += stepped
                busy = stepped or busy
            except (Fenced, LineageStopped) as exc:
                log.warning("model %s: dropped by %s: %s", model_id, self.worker_id, exc)
                self.lineages.pop(model_id, None)
            except Exception as exc:
                # Start again from the last version after the back-off: nothing
                # in memory is needed that the database does not hold.
                self.lineages.pop(model_id, None)
                self._fault(model_id, exc, lineage.head_id)
        self._working = working
        self._release_settled()
        return busy

    def _release_settled(self) -> None:
        """Let go of the lineages caught up for ``release_seconds``: their
        versions are written, so nothing in memory is lost, and a worker's
        memory stays that of the models with recent records. Records that
        arrive meanwhile are after the stored cursor: the next claim finds them."""
        now = time.monotonic()
        settled = [model_id for model_id, lineage in self.lineages.items()
                   if lineage.settled_since is not None
                   and now - lineage.settled_since >= self.settings.release_seconds]
        if not settled:
            return
        try:
            with transaction(self.writes) as session:
                release_trainers(session, self.worker_id, settled)
        except DATABASE_AWAY:
            return  # kept; tried again on the next pass
        for model_id in settled:
            self.lineages.pop(model_id, None)
        log.info("worker %s: released %s caught-up model(s)", self.worker_id, len(settled))

    def _retention(self, now: float) -> None:
        """A few batches of each kind of retention (upkeep.py); soon again while more remain."""
        done = retention_pass(self.settings, self.writes, self.reads)
        if done.cases:
            log.info("deleted %s scored cases without an outcome after %g days", done.cases,
                     self.settings.case_retention_days)
        if done.snapshots:
            log.info("pruned the snapshots of %s versions never active, older than %g days",
                     done.snapshots, self.settings.snapshot_retention_days)
        if done.tallies or done.tombstones:
            log.info("deleted %s drift tallies and %s deleted models' rows", done.tallies,
                     done.tombstones)
        self._next_retention = now + (self.settings.poll_seconds if done.more
                                      else INTERVAL_SECONDS)

    def _fault(self, model_id: int, exc: Exception, head_id: Any = ANY_HEAD) -> None:
        """This model failed to load or step from ``head_id``: back it off
        alone (faults.py), unless it is the database that failed, not the
        model, or the head has moved since (then the next try starts afresh)."""
        if isinstance(exc, DATABASE_AWAY) and not self._database_answers():
            if not self._database_away:
                log.warning("worker %s: database unavailable (%s); waiting for it",
                            self.worker_id, type(exc.orig or exc).__name__)
                self._database_away = True
            return
        text = describe(exc)
        try:
            fault = record_fault(self.writes, model_id, self.worker_id, text,
                                 self.settings.retry_seconds, self.settings.retry_max_seconds,
                                 head_id)
        except Exception:  # the lease runs out and the model is tried again then
            log.exception("model %s: recording its fault failed: %s", model_id, log_text(exc))
            return
        if fault is None:
            log.warning("model %s: failed, but another worker holds it or its head moved "
                        "since; not backed off: %s", model_id, log_text(exc))
            return
        # One line per try: a traceback only with the first try of a failure
        # we did not foresee (a fault of ours reads well on its own).
        log.warning("model %s: %s (try %s failed): %s; next try in %.3g s", model_id,
                    FAULT_LOG, fault.count, log_text(exc), fault.delay,
                    exc_info=exc if fault.count == 1 and not is_expected(exc) else None)

    def _database_answers(self) -> bool:
        try:
            with self.reads() as session:
                session.execute(select(1))
        except DATABASE_AWAY:
            return False
        return True

    def _heartbeat(self) -> None:
        with transaction(self.writes) as session:
            held = renew_trainers(session, self.worker_id, self.lineages,
                                  self.settings.lease_seconds)
        for model_id in list(self.lineages):
            lineage = self.lineages[model_id]
            if model_id not in held:
                log.warning("model %s: lease lost by %s", model_id, self.worker_id)
                self.lineages.pop(model_id)
            elif held[model_id] != lineage.head_id:
                # Another lineage was promoted (a retrain): restart from the new head.
                log.info("model %s: head moved; reloading", model_id)
                self.lineages.pop(model_id)

    def _claim(self) -> None:
        limit = self.settings.max_models
        # A few at a time, so workers starting together share the models.
        room = CLAIM_BATCH if limit is None else min(CLAIM_BATCH, limit - len(self.lineages))
        with transaction(self.writes) as session:
            ensure_trainer_rows(session)
            claimed = claim_trainers(session, self.worker_id, self.settings.lease_seconds,
                                     room, exclude=self.lineages)
        self._more_waiting = room > 0 and len(claimed) == room
        for model_id in claimed:
            log.info("model %s: leased by %s", model_id, self.worker_id)
            try:
                self.lineages[model_id] = OnlineLineage(
                    model_id, self.worker_id, self.settings, self.reads, self.writes
                )
            except Exception as exc:  # its spec, head or holdout records: this model only
                self._fault(model_id, exc, getattr(exc, "head_id", None) or ANY_HEAD)

    def _shutdown(self) -> None:
        self.jobs.close()
        for model_id, lineage in list(self.lineages.items()):
            try:
                lineage.flush()
            except (Fenced, LineageStopped) as exc:
                log.warning("model %s: final version not written: %s", model_id, exc)
            except Exception:
                log.exception("model %s: final version failed", model_id)
        try:
            with transaction(self.writes) as session:
                release_trainers(session, self.worker_id, self.lineages)
        except Exception:
            log.exception("worker %s: releasing leases failed (they will expire)",
                          self.worker_id)
        self.lineages.clear()
