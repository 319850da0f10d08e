"""Request metrics, request ids and structured JSON logs for the HTTP app.

``init_app(app)`` adds ``/metrics`` (Prometheus text format), a request counter
and latency histogram labelled by route template, and an ``X-Request-Id`` on
every answer (the caller's own when it sent a sane one). Under gunicorn every
worker is its own process, so metrics go through prometheus_client's
multiprocess mode whenever ``PROMETHEUS_MULTIPROC_DIR`` is set: each worker
writes its samples to files in that directory and ``/metrics`` sums them, so a
scrape answered by any worker reports the whole server. The variable must be
set before prometheus_client is first imported (service.web.server does it).

``configure_logging()`` makes every log line one JSON object carrying the
request id of the request it was written in; entry points (gunicorn, the
worker, the command line) call it, the app factory does not.
"""

from __future__ import annotations

import functools
import logging
import os
import re
import time
from collections.abc import Mapping
from typing import Any

from flask import Flask, Response, current_app, has_request_context, request
from prometheus_client import (
    CONTENT_TYPE_LATEST,
    REGISTRY,
    CollectorRegistry,
    Counter,
    Histogram,
    generate_latest,
    multiprocess,
    values,
)
from pythonjsonlogger.json import JsonFormatter

from service.config import read_setting
from service.web.auth import public
from service.web.redaction import redacted_query

REQUEST_ID_HEADER = "X-Request-Id"
# A caller's id is echoed only when it is short and plain, so it cannot smuggle
# newlines or markup into logs and headers.
_SANE_REQUEST_ID = re.compile(r"[A-Za-z0-9._:-]{1,128}")  # fullmatch: "$" lets a final "\n" by
_UNMATCHED_ROUTE = "<unmatched>"
# Every label value is from a closed set, whatever clients send: a method
# outside the standard ones (RFC 9110 section 9, and PATCH from RFC 5789) is
# counted as OTHER, a path as its route template or <unmatched>, a status as
# the code the app chose. One label value per random method made /metrics
# grow without bound.
KNOWN_METHODS = frozenset(
    ("GET", "HEAD", "POST", "PUT", "DELETE", "CONNECT", "OPTIONS", "TRACE", "PATCH"))
OTHER_METHOD = "OTHER"
_STARTED = "keelson.request_started"
_REQUEST_ID = "keelson.request_id"
_log = logging.getLogger("keelson.observability")


@functools.cache
def request_metrics() -> tuple[Counter, Histogram]:
    """The request counter and latency histogram, made once per process.

    Made on first use rather than at import: under gunicorn the master may
    import this module before the metrics folder is chosen, and each metric
    takes its storage (in memory, or the shared folder) when it is made.
    """
    requests = Counter(
        "keelson_http_requests_total",
        "HTTP requests answered, by method, route template and status code.",
        ["method", "route", "status"],
    )
    latency = Histogram(
        "keelson_http_request_duration_seconds",
        "Time from the start of the request to the answer, by method and route template.",
        ["method", "route"],
        buckets=(0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0),
    )
    return requests, latency


@functools.cache
def transport_refusals() -> Counter:
    """Requests the server answered itself, before the app: unparsable, too
    large or too slow (service.web.transport), by status code."""
    return Counter("keelson_http_refused_total",
                   "Requests the server answered itself before the app (unparsable, too "
                   "large or too slow), by status code.", ["status"])


def init_app(app: Flask) -> None:
    """Bind metrics, request ids and the /metrics route to ``app``."""
    folder = multiprocess_dir()
    if folder is not None:  # prometheus_client writes there but never creates it
        os.makedirs(folder, exist_ok=True)
    requests, latency = request_metrics()
    # Metric children by label values: labels() builds and locks on every
    # call; the set of (method, route, status) a server sees is small.
    counters: dict[tuple[str, str, int], Any] = {}
    histograms: dict[tuple[str, str], Any] = {}

    def count_request(response: Response) -> Response:
        current = request._get_current_object()  # type: ignore[attr-defined]
        started = current.environ.get(_STARTED)
        if started is None:  # a request context pushed without the middleware (tests)
            started = time.perf_counter()
        rule = current.url_rule
        route = rule.rule if rule is not None else _UNMATCHED_ROUTE
        method, status = current.method, response.status_code
        if method not in KNOWN_METHODS:
            method = OTHER_METHOD
        try:
            counter = counters.get((method, route, status))
            if counter is None:
                counter = counters[(method, route, status)] = requests.labels(
                    method, route, str(status))
            histogram = histograms.get((method, route))
            if histogram is None:
                histogram = histograms[(method, route)] = latency.labels(method, route)
            counter.inc()
            histogram.observe(time.perf_counter() - started)
        except OSError:  # a lost metrics folder must not fail the answer itself
            _log.exception("could not record request metrics")
        return response

    # The clock and the id are set in front of Flask (RequestStamp): every
    # request has both before any hook runs, and every answer carries the id,
    # whichever hook or error handler made it.
    app.wsgi_app = RequestStamp(app.wsgi_app)  # type: ignore[method-assign]
    app.after_request(count_request)
    app.add_url_rule("/metrics", "metrics", public(metrics_view), methods=["GET"])


class RequestStamp:
    """WSGI middleware: starts each request's clock, fixes its id (the caller's
    own when sane) and adds ``X-Request-Id`` to the answer.

    The header goes onto the plain list given to ``start_response``: setting
    it through the response's header object in a Flask hook cost several
    times more, on every request.
    """

    def __init__(self, app: Any) -> None:
        self.app = app

    def __call__(self, environ: dict[str, Any], start_response: Any) -> Any:
        environ[_STARTED] = time.perf_counter()
        request_id = _request_id_of(environ)

        def start_with_id(status: str, headers: list[tuple[str, str]],
                          exc_info: Any = None) -> Any:
            headers.append((REQUEST_ID_HEADER, request_id))
            return start_response(status, headers, exc_info)

        return self.app(environ, start_with_id)


def _request_id_of(environ: dict[str, Any]) -> str:
    """The id of the request of ``environ``, fixed on first use."""
    request_id: str | None = environ.get(_REQUEST_ID)
    if request_id is None:
        request_id = environ[_REQUEST_ID] = request_id_for(environ.get("HTTP_X_REQUEST_ID"))
    return request_id


def request_id_for(given: str | None) -> str:
    """The caller's id when it sent a sane one, else a new one."""
    return given if given and _SANE_REQUEST_ID.fullmatch(given) else _new_request_id()


def current_request_id() -> str | None:
    """The id of the request being answered, or None outside a request."""
    return _request_id_of(request.environ) if has_request_context() else None


def _new_request_id() -> str:
    return os.urandom(16).hex()  # 128 random bits, as a UUID4 has, without the object


# The app's collectors read at scrape time (domain series worked out from the
# database, the same whichever worker answers): app.extensions[SCRAPE_COLLECTORS].
SCRAPE_COLLECTORS = "keelson.scrape_collectors"


def metrics_view() -> Response:
    """Prometheus text exposition of this server's metrics (all workers)."""
    body = render_metrics()
    collectors = current_app.extensions.get(SCRAPE_COLLECTORS)
    if collectors:
        # auto_describe off: registering does not collect; generate_latest does, once.
        registry = CollectorRegistry(auto_describe=False)
        for collector in collectors:
            registry.register(collector)
        body += generate_latest(registry)
    return Response(body, content_type=CONTENT_TYPE_LATEST)


def render_metrics() -> bytes:
    if multiprocess_dir() is None:
        return generate_latest(REGISTRY)
    # A fresh registry per scrape: MultiProcessCollector reads every worker's
    # files at collection time (prometheus_client's documented multiprocess use).
    registry = CollectorRegistry()
    multiprocess.MultiProcessCollector(registry)  # type: ignore[no-untyped-call]
    return generate_latest(registry)


def multiprocess_dir() -> str | None:
    """The shared metrics directory, when this process writes its samples there.

    prometheus_client picks its value store once, at import, from the
    environment; follow that choice rather than the environment of today."""
    if values.ValueClass is values.MutexValue:
        return None
    folder: str | None = read_setting("PROMETHEUS_MULTIPROC_DIR")
    return folder


# ---------------------------------------------------------------- logging


class RequestIdFilter(logging.Filter):
    """Stamps each record with the id of the request it was written in."""

    def filter(self, record: logging.LogRecord) -> bool:
        if getattr(record, "request_id", None) is None:
            record.request_id = current_request_id()
        return True


class AccessFields(logging.Filter):
    """Turns gunicorn's access-log atoms into JSON fields (method, path, status,
    duration, request id) instead of one pre-formatted string; secrets sent in
    the query string are redacted from the line and the fields."""

    def filter(self, record: logging.LogRecord) -> bool:
        atoms = record.args if isinstance(record.args, Mapping) else {}
        query = atoms.get("q")
        if query and isinstance(query, str):
            safe = redacted_query(query)
            if safe != query:
                line = str(atoms.get("r", ""))
                atoms = {**atoms, "q": safe, "r": line.replace(f"?{query}", f"?{safe}", 1)}
                record.args = atoms
        if atoms:
            record.remote_addr = atoms.get("h")
            record.method = atoms.get("m")
            record.path = atoms.get("U")
            record.query = atoms.get("q") or None
            record.status = _int_or_none(atoms.get("s"))
            record.bytes = _int_or_none(atoms.get("B"))
            record.duration_ms = _float_or_none(atoms.get("D"), scale=1e-3)
            record.user_agent = atoms.get("a")
            request_id = atoms.get("{x-request-id}o")
            record.request_id = None if request_id in (None, "-") else request_id
        return True


def _int_or_none(value: Any) -> int | None:
    try:
        return int(value)
    except (TypeError, ValueError):
        return None


def _float_or_none(value: Any, scale: float = 1.0) -> float | None:
    try:
        return round(float(value) * scale, 3)
    except (TypeError, ValueError):
        return None


JSON_LOG_FORMAT = "%(asctime)s %(levelname)s %(name)s %(process)d %(message)s"


def json_formatter() -> JsonFormatter:
    return JsonFormatter(
        JSON_LOG_FORMAT,
        rename_fields={"asctime": "time", "levelname": "level", "name": "logger",
                       "process": "pid"},
        timestamp=False,
    )


def logging_config(level: str = "INFO") -> dict[str, Any]:
    """A ``logging.config.dictConfig`` mapping: every logger (gunicorn's too)
    writes one JSON object per line to stderr, the access log with fields."""
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "filters": {
            "request_id": {"()": RequestIdFilter},
            "access_fields": {"()": AccessFields},
        },
        "formatters": {"json": {"()": json_formatter}},
        "handlers": {
            "stderr": {
                "class": "logging.StreamHandler",
                "formatter": "json",
                "filters": ["request_id"],
                "stream": "ext://sys.stderr",
            },
            "access": {
                "class": "logging.StreamHandler",
                "formatter": "json",
                "filters": ["access_fields", "request_id"],
                "stream": "ext://sys.stdout",
            },
        },
        "root": {"level": level, "handlers": ["stderr"]},
        "loggers": {
            "gunicorn.error": {"level": level, "handlers": ["stderr"], "propagate": False},
            "gunicorn.access": {"level": "INFO", "handlers": ["access"], "propagate": False},
            # /readyz asks alembic whether the schema is current: one line per
            # probe at INFO would drown the log.
            "alembic": {"level": "WARNING"},
        },
    }


def configure_logging(level: str | None = None) -> None:
    """JSON logs on stderr for a process started by an entry point (idempotent)."""
    import logging.config

    chosen = (level or read_setting("KEELSON_LOG_LEVEL")).upper()
    root = logging.getLogger()
    if any(getattr(h, "_keelson_json", False) for h in root.handlers):
        root.setLevel(chosen)
        return
    logging.config.dictConfig(logging_config(chosen))
    for handler in root.handlers:
        handler._keelson_json = True  # type: ignore[attr-defined]
