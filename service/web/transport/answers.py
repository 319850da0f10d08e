"""Answers the transport gives itself, before or instead of the app.

gunicorn answers a request it cannot parse with a short HTML page; the
buffering worker answers requests that are too large or too slow. Both become
what every answer of the app is: RFC 9457 problem details
(service.web.problems), the security headers (service.web.headers) and an
``X-Request-Id``; the detail is a fixed sentence per status, never an echo of
the request (which may hold a token) nor a parser's internals.
"""

from __future__ import annotations

import ssl
from datetime import timedelta
from http import HTTPStatus
from typing import Any

from gunicorn.http import errors as http_errors
from gunicorn.http.wsgi import Response, default_environ

from service.web.headers import SECURITY_HEADERS
from service.web.observability import request_id_for, transport_refusals

# gunicorn's parse errors with a status of their own; any other parse error is 400.
_STATUS_OF: tuple[tuple[type[Exception], int], ...] = (
    (http_errors.InvalidResponseHeader, 500),  # the application's fault, not the client's
    (http_errors.InvalidResponseHeaderName, 500),
    (http_errors.LimitRequestLine, 414),
    (http_errors.LimitRequestHeaders, 431),
    (http_errors.ExpectationFailed, 417),
    (http_errors.UnsupportedTransferCoding, 501),
    (http_errors.ForbiddenProxyRequest, 403),
    (http_errors.ConfigurationProblem, 500),
)
DETAILS = {
    400: "The request is not valid HTTP/1.1 (RFC 9112).",
    403: "Requests from this address are not accepted.",
    408: "The request did not arrive in time.",
    414: "The request line is too long.",
    417: "Only the 100-continue expectation is supported (RFC 9110 section 10.1.1).",
    431: "The request head has too many fields, or one too long.",
    500: "The server failed to answer; the error has been logged.",
    501: "Only the chunked transfer coding is supported in requests.",
}


def status_of(error: BaseException) -> int:
    """The status gunicorn's own error handling gives ``error``."""
    for kind, status in _STATUS_OF:
        if isinstance(error, kind):
            return status
    if isinstance(error, http_errors.ParseException | ssl.SSLError):
        return 400
    return 500


def problem_answer(status: int, detail: str, request_id: str) -> bytes:
    """A whole HTTP/1.1 answer (closing the connection) with a problem body."""
    from service.web.problems import problem  # the app's modules load after the fork

    response = problem(status, detail)
    body = response.get_data()
    lines = [
        f"HTTP/1.1 {status} {HTTPStatus(status).phrase}",
        f"Content-Type: {response.content_type}",
        f"Content-Length: {len(body)}",
        "Connection: close",
        *(f"{name}: {value}" for name, value in SECURITY_HEADERS.items()),
        f"X-Request-Id: {request_id}",
    ]
    return ("\r\n".join(lines) + "\r\n\r\n").encode("latin-1") + body


def answer_parse_error(log: Any, cfg: Any, req: Any, client: Any, addr: Any,
                       error: BaseException) -> None:
    """gunicorn's ``Worker.handle_error``, answering with problem details: the
    status gunicorn would give, a fixed detail, and the log line without the
    request (its line may hold a token)."""
    status = status_of(error)
    if status >= 500:
        log.error("error answering a request for %s", getattr(req, "path", "?"),
                  exc_info=error)
    else:
        log.warning("refused a request from %s: %s (%s)", client_address(addr), status,
                    type(error).__name__)
    transport_refusals().labels(str(status)).inc()
    request_id = request_id_for(_header(req, "X-REQUEST-ID"))
    answer = problem_answer(status, DETAILS[status], request_id)
    if req is not None:
        environ = default_environ(req, client, cfg)
        environ["REMOTE_ADDR"] = client_address(addr)
        resp = Response(req, client, cfg)
        resp.status = f"{status} {HTTPStatus(status).phrase}"
        resp.headers = [("X-Request-Id", request_id)]
        resp.response_length = len(answer)
        log.access(resp, req, environ, timedelta(0))
    try:
        client.sendall(answer)
    except OSError:
        log.debug("could not send the error answer")


def client_address(client: Any) -> str:
    return str(client[0]) if isinstance(client, tuple) and client else ""


def _header(req: Any, name: str) -> str | None:
    for key, value in getattr(req, "headers", None) or ():
        if key == name:
            return str(value)
    return None
