"""Running claimed jobs on a background thread, one at a time per worker.

A job runs beside the online loop so a long retrain does not stall online
learning. A second small thread renews the job's lease while it runs, so a job
whose worker died is picked up again once the lease expires (leasing.py); if
the lease is lost anyway (a stalled worker), the job is cancelled and nothing
it would write is accepted (versions.py fences on the job's holder).
"""

from __future__ import annotations

import logging
import threading
import time

from sqlalchemy.exc import OperationalError
from sqlalchemy.orm import Session, sessionmaker

from engine import TrainingCancelled
from service.store.database import transaction
from service.usecases.deletion import DELETE_JOB
from service.versions.writes import Fenced
from service.worker.deletion import run_delete
from service.worker.faults import describe, is_expected, log_text
from service.worker.jobs import fail_job, requeue_job, retry_job
from service.worker.leasing import claim_job, renew_job
from service.worker.retrain import run_retrain
from service.worker.settings import WorkerSettings

log = logging.getLogger("keelson.worker")
# What a job shows when the database cut an attempt short; the driver's own
# text (which may quote SQL) goes to the log only.
DATABASE_INTERRUPTED = "a database error interrupted the job; the worker's log has the details"


class JobRunner:
    """Runs at most one claimed job at a time on a background thread."""

    def __init__(self, settings: WorkerSettings, reads: sessionmaker[Session],
                 writes: sessionmaker[Session], worker_id: str,
                 stop: threading.Event) -> None:
        self.settings, self.reads, self.writes = settings, reads, writes
        self.worker_id, self.stop = worker_id, stop
        self._thread: threading.Thread | None = None
        self._next_poll = 0.0

    def poll(self) -> bool:
        """Claim a job when none is running (at most once per poll interval).
        True when the database was asked (and answered)."""
        if self._thread is not None and self._thread.is_alive():
            return False
        now = time.monotonic()
        if now < self._next_poll:
            return False
        self._next_poll = now + max(self.settings.poll_seconds, 1.0)
        with transaction(self.writes) as session:
            job = claim_job(session, self.worker_id, self.settings.lease_seconds)
            job_id, kind = (None, "") if job is None else (job.id, job.kind)
        if job_id is None:
            return True
        log.info("job %s: claimed by %s", job_id, self.worker_id)
        self._thread = threading.Thread(target=self._run, args=(job_id, kind),
                                        name=f"job-{job_id}", daemon=True)
        self._thread.start()
        return True

    def close(self) -> None:
        """Wait for the running job (the stop event cancels it)."""
        if self._thread is not None:
            self._thread.join()

    def _run(self, job_id: int, kind: str) -> None:
        lost = threading.Event()
        done = threading.Event()
        keeper = threading.Thread(target=self._keep_lease, args=(job_id, lost, done),
                                  daemon=True)
        keeper.start()
        cancel = lambda: self.stop.is_set() or lost.is_set()  # noqa: E731
        try:
            if kind == DELETE_JOB:
                run_delete(self.settings, self.reads, self.writes, job_id, self.worker_id, cancel)
            else:
                run_retrain(self.settings, self.reads, self.writes, job_id, self.worker_id,
                            cancel=cancel)
        except TrainingCancelled:
            if not lost.is_set():
                requeue_job(self.writes, job_id, self.worker_id)
            log.info("job %s: handed back", job_id)
        except Fenced as exc:
            log.warning("job %s: %s", job_id, exc)
        except OperationalError as exc:
            # The database failed the attempt, not the job (PostgreSQL's
            # deadlock detection or a lost connection): try it again.
            log.warning("job %s: database error, queued again: %s", job_id, exc.orig)
            try:
                retry_job(self.writes, job_id, self.worker_id, DATABASE_INTERRUPTED)
            except Exception:  # its lease runs out and a worker claims it again
                log.exception("job %s: queueing it again failed", job_id)
        except Exception as exc:
            if is_expected(exc):  # a fault of the model's, said in full by its message
                log.warning("job %s: failed: %s", job_id, log_text(exc))
            else:
                log.exception("job %s: failed", job_id)
            try:
                fail_job(self.writes, job_id, self.worker_id, describe(exc))
            except Exception:
                log.exception("job %s: recording the failure failed", job_id)
        finally:
            done.set()
            keeper.join()

    def _keep_lease(self, job_id: int, lost: threading.Event, done: threading.Event) -> None:
        while not done.wait(self.settings.heartbeat_seconds):
            try:
                with transaction(self.writes) as session:
                    held = renew_job(session, self.worker_id, job_id,
                                     self.settings.lease_seconds)
            except Exception:
                log.exception("job %s: lease renewal failed", job_id)
                continue
            if not held:
                lost.set()
                return
