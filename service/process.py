"""What a Keelson process does first: take SIGTERM and SIGINT as a clean stop
from its first instant, and keep BLAS to one thread.

Orchestrators send SIGTERM whenever they like, start-up included. The
long-running commands (``keelson worker``, ``keelson serve``) install the
handler before anything heavy is imported, so a stop that lands while they
load is remembered and honoured as a clean exit (status 0, nothing written)
as soon as they look at it. Other commands keep Python's default handling, so
Ctrl-C still interrupts an import or a demo at once.

One BLAS thread: Keelson's arrays are small (one record, or a few dozen
integrated-gradient steps); a multi-threaded BLAS spends more on waking and
spinning its threads than it saves, and on a shared host it takes cores from
the database and the API. Each long-running process pins BLAS to one thread
at start and scales out by processes instead (measured: the worker's CPU for
100k records fell from about 9 s to 3.5 s on 2 cores, `keelson bench worker`).

Nothing heavy is imported at module level: this runs before the rest loads.
"""

from __future__ import annotations

import signal
import threading

# The commands that run until told to stop, and so take SIGTERM as "stop cleanly".
LONG_RUNNING = frozenset({"worker", "serve"})
STOP_SIGNALS = (signal.SIGTERM, signal.SIGINT)
_STOP = threading.Event()


def stop_on_signals() -> threading.Event:
    """Make SIGTERM and SIGINT set this process's stop event, and return it.

    Idempotent. Only the main thread may install signal handlers; callers on
    another thread pass their own event to what they run instead.
    """
    for signum in STOP_SIGNALS:
        signal.signal(signum, _request_stop)
    # A launcher may start us with these blocked (``keelson serve`` does, see
    # block_stop_signals): one that arrived meanwhile is pending, and is
    # delivered to the handler now.
    signal.pthread_sigmask(signal.SIG_UNBLOCK, STOP_SIGNALS)
    return _STOP


def block_stop_signals() -> None:
    """Block SIGTERM and SIGINT in this process (for a child before it execs:
    the mask is inherited, so a stop sent while the child's interpreter starts
    stays pending until its ``stop_on_signals`` is ready for it)."""
    signal.pthread_sigmask(signal.SIG_BLOCK, STOP_SIGNALS)


def _request_stop(signum: int, frame: object) -> None:
    _STOP.set()


def take_stop_signals_for(arguments: list[str]) -> None:
    """``stop_on_signals()`` when the command line names a long-running command
    (its first word that is not an option)."""
    command = next((word for word in arguments if not word.startswith("-")), None)
    if command in LONG_RUNNING:
        stop_on_signals()


def pin_blas_to_one_thread() -> None:
    """Limit BLAS to one thread for the rest of the process.

    threadpoolctl limits the libraries loaded when it is called, so NumPy (and
    its BLAS) is loaded first: the worker and gunicorn's post_fork call this
    before anything has imported NumPy, and the limit was then a no-op (BLAS
    ran with a thread per core)."""
    import numpy  # noqa: F401  (loads the BLAS library the limit applies to)
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=1, user_api="blas")
