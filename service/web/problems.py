"""One error envelope for every failure: RFC 9457 problem details.

Every error answer, unhandled ones included, is ``application/problem+json``
with ``type``, ``title``, ``status``, ``detail`` and, for validation errors,
``errors``: field paths mapped to lists of messages. Never an HTML page.
Unexpected exceptions are logged with their traceback and answered without it;
in testing they surface instead, so a test sees the real failure.

Every answer stays under 1 MiB whatever the request (a 34 KB ingest once drew
a 102 MB 422): ``problem`` lists the first ``MAX_LISTED_ERRORS`` field paths
and counts the rest in ``errors_omitted``, and cuts every path, message and
detail short (``clip``). Where messages are made, they echo no long lists
either (service/web/schemas/fields.py).

Rendering an envelope cannot fail on the text it carries: a field path or a
message quoting text that breaks the text rule (a lone surrogate, refused by
``service.text``) is shown escaped, so the answer is always UTF-8.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Mapping
from http import HTTPStatus
from typing import Any

from flask import Flask, Response, current_app
from sqlalchemy import exc as sa_exc
from werkzeug.exceptions import HTTPException

from service.errors import KeelsonError
from service.text import shown_value

PROBLEM_MIMETYPE = "application/problem+json"
# RFC 9457 section 4.2.1: "about:blank" means the status code says it all.
BLANK = "about:blank"
VALIDATION_TYPE = "urn:keelson:problem:invalid-input"
# Headers of an HTTP error worth keeping on the problem answer.
_KEPT_HEADERS = ("Allow", "WWW-Authenticate", "Retry-After")
# The size caps of an answer, in characters. JSON spends at most 6 bytes on a
# character (a control character as \u0001), so the listed errors take at most
# 100 x (200 + 3 x 300) x 6 = 660,000 bytes and the detail 12,000: with the
# fixed members, under 1 MiB (tests/reliability/test_answer_sizes.py).
MAX_LISTED_ERRORS = 100
MAX_MESSAGES_PER_PATH = 3
MAX_PATH_CHARS = 200
MAX_MESSAGE_CHARS = 300
MAX_DETAIL_CHARS = 2000

log = logging.getLogger(__name__)


def problem(
    status: int,
    detail: str,
    *,
    errors: Mapping[str, list[str]] | None = None,
    title: str | None = None,
    type_: str | None = None,
    headers: Mapping[str, str] | None = None,
    members: Mapping[str, Any] | None = None,
) -> Response:
    """A problem details answer (``members``: extension members)."""
    body: dict[str, Any] = {
        "type": type_ or (VALIDATION_TYPE if errors else BLANK),
        "title": title or HTTPStatus(status).phrase,
        "status": status,
        "detail": clip(detail, MAX_DETAIL_CHARS),
    }
    if errors:
        body["errors"], omitted = _listed(errors)
        if omitted:
            body["errors_omitted"] = omitted
    if members:
        body.update(members)
    try:
        data = json.dumps(body, ensure_ascii=False).encode("utf-8")
    except UnicodeEncodeError:  # rare: only text the rule refuses cannot be encoded
        data = json.dumps(shown_value(body), ensure_ascii=False).encode("utf-8")
    response = Response(data, status=status, mimetype=PROBLEM_MIMETYPE)
    for name, value in (headers or {}).items():
        response.headers[name] = value
    return response


def clip(text: str, limit: int) -> str:
    """``text`` cut to at most ``limit`` characters, saying how long it was."""
    if len(text) <= limit:
        return text
    note = f"... ({len(text):,} characters)"
    return text[:max(limit - len(note), 0)] + note


def _listed(errors: Mapping[str, list[str]]) -> tuple[dict[str, list[str]], int]:
    """The first field paths and their first messages, each cut short, and
    how many paths were left out."""
    listed: dict[str, list[str]] = {}
    for taken, (path, messages) in enumerate(errors.items()):
        if taken == MAX_LISTED_ERRORS:
            return listed, len(errors) - taken
        # Two long paths may share their first characters: the later one
        # joins the messages of the first rather than replacing them.
        shown = listed.setdefault(clip(path, MAX_PATH_CHARS), [])
        for message in messages[:MAX_MESSAGES_PER_PATH]:
            if len(shown) < MAX_MESSAGES_PER_PATH:
                shown.append(clip(message, MAX_MESSAGE_CHARS))
    return listed, 0


def flatten_messages(messages: Any, prefix: str = "") -> dict[str, list[str]]:
    """marshmallow's nested error dict as flat field paths.

    ``{"records": {3: {"features": {"x": ["..."]}}}}`` becomes
    ``{"records.3.features.x": ["..."]}``; a schema-level ``_schema`` entry is
    reported at its parent's path (``body`` at the top).
    """
    flat: dict[str, list[str]] = {}
    _flatten_into(flat, messages, prefix)
    return flat


def _flatten_into(flat: dict[str, list[str]], messages: Any, path: str) -> None:
    if isinstance(messages, Mapping):
        for key, value in messages.items():
            child = path if key == "_schema" else f"{path}.{key}" if path else str(key)
            _flatten_into(flat, value, child)
    elif isinstance(messages, list | tuple) and all(isinstance(m, str) for m in messages):
        flat.setdefault(path or "body", []).extend(messages)
    elif isinstance(messages, list | tuple):
        for item in messages:
            _flatten_into(flat, item, path)
    else:
        flat.setdefault(path or "body", []).append(str(messages))


def _webargs_errors(error: HTTPException) -> dict[str, list[str]] | None:
    """Field errors flask-smorest attached to a 422 (``data["messages"]``),
    keyed by location; the JSON body's paths are given without a prefix."""
    data = getattr(error, "data", None)
    if not isinstance(data, Mapping) or "messages" not in data:
        return None
    flat: dict[str, list[str]] = {}
    for location, messages in data["messages"].items():
        prefix = "" if location == "json" else str(location)
        flat.update(flatten_messages(messages, prefix))
    return flat


def handle_http_exception(error: HTTPException) -> Response:
    status = error.code or 500
    headers = {
        name: value for name, value in error.get_headers() if name in _KEPT_HEADERS
    }
    errors = _webargs_errors(error)
    if errors:
        return problem(status, "The request has invalid fields.", errors=errors,
                       headers=headers)
    detail = getattr(error, "keelson_detail", None) or error.description or ""
    return problem(status, detail, headers=headers)


def handle_keelson_error(error: KeelsonError) -> Response:
    return problem(
        error.status, error.detail, errors=error.errors, headers=error.headers,
        type_=error.problem_type, members=error.members, title=error.title,
    )


# Failures to reach or use the database that pass when it is back (server
# restarting, connection dropped, pool exhausted): a 503 the client can retry,
# not a 500. The engine's pre-ping reconnects on the next request.
DATABASE_UNAVAILABLE = (sa_exc.OperationalError, sa_exc.InterfaceError, sa_exc.TimeoutError)
RETRY_AFTER_SECONDS = "1"


def handle_database_unavailable(error: Exception) -> Response:
    log.warning("database unavailable while answering a request: %s",
                type(getattr(error, "orig", None) or error).__name__)
    return problem(503, "The database is unavailable for the moment; retry shortly.",
                   headers={"Retry-After": RETRY_AFTER_SECONDS})


def handle_unexpected(error: Exception) -> Response:
    if current_app.testing or current_app.config.get("PROPAGATE_EXCEPTIONS"):
        raise error
    log.error("unhandled error answering a request", exc_info=error)
    return problem(500, "The server failed to answer; the error has been logged.")


def init_app(app: Flask) -> None:
    """Register the handlers (after flask-smorest's own, which they replace)."""
    app.register_error_handler(HTTPException, handle_http_exception)
    app.register_error_handler(KeelsonError, handle_keelson_error)
    for database_error in DATABASE_UNAVAILABLE:
        app.register_error_handler(database_error, handle_database_unavailable)
    app.register_error_handler(Exception, handle_unexpected)
