"""gunicorn settings for the Keelson API (``gunicorn -c python:service.web.server``).

Every value comes from a ``KEELSON_*`` setting (and ``PROMETHEUS_MULTIPROC_DIR``,
``FORWARDED_ALLOW_IPS``), read through service/config.py: the one registry of
settings, whose table with meanings and defaults is the README's
"Configuration". A value that cannot be used stops the server with one line
naming the setting. Command-line flags (and ``GUNICORN_CMD_ARGS``) still win
over these.
"""

from __future__ import annotations

import gc
import logging
import os
import re
import socket
import tempfile
from pathlib import Path
from typing import Any

from service.config import ConfigError, read_setting


def _setting(name: str) -> Any:
    try:
        return read_setting(name)
    except ConfigError as error:
        raise SystemExit(str(error)) from None


# Metrics of all workers meet in one folder (prometheus_client multiprocess
# mode); it must be in the environment before any worker imports the client.
if _setting("PROMETHEUS_MULTIPROC_DIR") is None:
    os.environ["PROMETHEUS_MULTIPROC_DIR"] = tempfile.mkdtemp(prefix="keelson-metrics-")
_METRICS_DIR = Path(_setting("PROMETHEUS_MULTIPROC_DIR"))

# prometheus_client chooses its value store from the environment once, at
# import; importing this module's package may already have imported it. Choose
# again now that the folder is set (service.web.observability makes its metrics
# only when the app is built, in each worker, after this).
from prometheus_client import values as _prometheus_values  # noqa: E402

_prometheus_values.ValueClass = _prometheus_values.get_value_class()  # type: ignore[no-untyped-call]

from gunicorn.glogging import Logger  # noqa: E402

from service.web.observability import logging_config  # noqa: E402
from service.web.transport.limits import TransportLimits  # noqa: E402
from service.web.transport.worker import BufferingWorker  # noqa: E402

bind = [f"{_setting('KEELSON_HOST')}:{_setting('KEELSON_PORT')}"]
workers = _setting("KEELSON_WEB_WORKERS")
# gthread, with every request read whole by the worker's event loop before a
# thread handles it (docs/transport.md): slow or stalled clients hold no
# thread. Threads let one worker overlap database waits; NumPy releases the
# GIL in its inner loops.
worker_class = BufferingWorker.configured(TransportLimits.from_settings(_setting))
threads = _setting("KEELSON_THREADS")
# Answers go through the worker's buffered writes, never os.sendfile.
sendfile = False
timeout = _setting("KEELSON_TIMEOUT")
graceful_timeout = _setting("KEELSON_GRACEFUL_TIMEOUT")
keepalive = _setting("KEELSON_KEEPALIVE")
# One listening socket per worker (SO_REUSEPORT): the kernel spreads new
# connections over the workers. With one shared socket the workers race to
# accept, and the winner keeps the keep-alive connections it took: 16
# connections opened together split 16/0, 15/1, 14/2 ... 9/7 over two workers
# (8 trials; SO_REUSEPORT: 11/5 at worst), the busy one queueing while the
# other idles. Cost: connections still queued on a worker that dies are
# reset, not taken by its siblings. on_starting refuses an address another
# server listens on, which SO_REUSEPORT would otherwise share silently.
reuse_port = _setting("KEELSON_REUSE_PORT")
# Each worker imports the app itself: no database connection or file handle is
# shared across a fork.
preload_app = False
wsgi_app = "service.web.app:create_app()"
proc_name = "keelson-api"
# gunicorn's control socket is one path per user: several servers on one host
# (tests, benchmarks) would fight over it, and Keelson does not use it.
control_socket_disable = True

loglevel = _setting("KEELSON_LOG_LEVEL")
_access = _setting("KEELSON_ACCESS_LOG")
logconfig_dict = logging_config(loglevel.upper())
if not _access:
    logconfig_dict["loggers"]["gunicorn.access"]["level"] = "WARNING"


class AccessLevelLogger(Logger):  # type: ignore[misc]  # gunicorn ships no types
    """gunicorn's logger, building a request's access-log fields only when the
    access logger would write them.

    With a logging configuration given, gunicorn builds every request's atoms
    (a dict of the request and response headers and more) before the logger's
    level drops the line; with ``KEELSON_ACCESS_LOG=0`` that was work thrown
    away on every request.
    """

    def access(self, resp: Any, req: Any, environ: Any, request_time: Any) -> None:
        if self.access_log.isEnabledFor(logging.INFO):
            super().access(resp, req, environ, request_time)


logger_class = AccessLevelLogger
# The access log becomes JSON fields (see observability.AccessFields); this
# format is only the plain "message" field beside them.
access_log_format = '%(h)s "%(r)s" %(s)s %(b)s %(M)sms'
# Forwarded headers are trusted only from the local proxy by default.
forwarded_allow_ips = _setting("FORWARDED_ALLOW_IPS")


# prometheus_client's sample files: <kind>_<pid>.db. Only these are removed, so
# a folder shared with anything else loses nothing else. Matched whole
# (fullmatch): "$" would let a final newline by.
_SAMPLE_FILE = re.compile(r"(counter|gauge_[a-z]+|histogram|summary)_\d+\.db")


def on_starting(server: Any) -> None:
    """Refuse an address something already listens on (see ``reuse_port``),
    and start from an empty metrics folder: samples left by an earlier run
    would otherwise be summed into this one's. Retired settings are named
    in the log (service/config.py)."""
    from service.config import warn_of_retired

    warn_of_retired()
    if server.cfg.reuse_port:
        for address in server.cfg.address:
            if isinstance(address, tuple):
                refuse_a_taken_address(address[0], int(address[1]))
        # gunicorn's own "Listening at" line is empty: the workers bind.
        server.log.info("each worker listens on %s (SO_REUSEPORT)", ", ".join(
            f"{a[0]}:{a[1]}" if isinstance(a, tuple) else str(a) for a in server.cfg.address))
    _METRICS_DIR.mkdir(parents=True, exist_ok=True)
    for entry in _METRICS_DIR.iterdir():
        if entry.is_file() and _SAMPLE_FILE.fullmatch(entry.name):
            entry.unlink()


def refuse_a_taken_address(host: str, port: int) -> None:
    """Exit when another socket listens on ``host:port``.

    A plain bind (no SO_REUSEPORT) fails wherever any socket listens, even one
    that allows sharing; SO_REUSEADDR keeps connections lingering in TIME_WAIT
    from counting, as they do not for gunicorn's own bind.
    """
    for family, kind, proto, _, where in socket.getaddrinfo(
            host, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE):
        with socket.socket(family, kind, proto) as probe:
            probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            try:
                probe.bind(where)
            except OSError as error:
                raise SystemExit(
                    f"cannot listen on {host}:{port}: {error.strerror} (is another server "
                    "running there?)") from None


def post_fork(server: Any, worker: Any) -> None:
    """Each API process computes on small arrays: one BLAS thread (service/process.py)."""
    from service.process import pin_blas_to_one_thread

    pin_blas_to_one_thread()


def post_worker_init(worker: Any) -> None:
    """The worker has loaded the app: hand what is alive now (modules, the app,
    its schemas, ~90k objects) to the collector's permanent generation, so a
    full collection scans only what requests leave behind. Measured in process:
    a full collection of a loaded app took about 50 ms, stalling every request
    on that worker meanwhile; after it, none of 20,000 requests saw a collection
    over 1 ms."""
    gc.collect()
    gc.freeze()


def worker_exit(server: Any, worker: Any) -> None:
    """In the worker, as it exits after a clean stop: write the drift counts it
    holds (service/usecases/drift_tally.py); a worker killed outright loses at
    most one flush interval of them."""
    app = getattr(worker, "wsgi", None)
    if app is not None and hasattr(app, "extensions"):
        from service.web.extensions import close_drift_tally

        close_drift_tally(app)


def child_exit(server: Any, worker: Any) -> None:
    """A worker died or was replaced: drop its live gauges (prometheus_client's
    multiprocess documentation)."""
    from prometheus_client import multiprocess

    multiprocess.mark_process_dead(worker.pid)  # type: ignore[no-untyped-call]
