"""The request target's text: once percent-decoded, path and query are UTF-8.

A URI carries text as percent-encoded UTF-8 bytes (RFC 3986 section 2.5). The
server quietly mends bytes that are not UTF-8: werkzeug turns them into
U+FFFD in the path and keeps them undecoded (``%ED%A0%80``, the bytes that
would spell the lone surrogate U+D800) in a query parameter, so a value could
arrive as text the client never sent. Such a target is refused (400), from the
raw target and before authentication, like a body that is not UTF-8: the text
rule (``service.text``) holds at this door too.
"""

from __future__ import annotations

from urllib.parse import unquote_to_bytes

from flask import Flask, request

from service.errors import MalformedError


def is_utf8_target(raw: str) -> bool:
    """Whether ``raw`` (a request target, as the server read it: one character
    per byte) is UTF-8 once percent-decoded."""
    if raw.isascii() and "%" not in raw:
        return True  # the common case: one C-level scan, nothing decoded
    try:
        data = raw.encode("latin-1")
    except UnicodeEncodeError:  # the server decoded it already: its characters as UTF-8
        data = raw.encode("utf-8", "surrogatepass")
    try:
        unquote_to_bytes(data).decode("utf-8")
    except UnicodeDecodeError:
        return False
    return True


def refuse_target_not_utf8() -> None:
    """``before_request``: 400 when the path or the query is not UTF-8."""
    environ = request.environ
    # The undecoded target: gunicorn's RAW_URI, or REQUEST_URI (werkzeug's servers).
    raw: str = environ.get("RAW_URI") or environ.get("REQUEST_URI") or ""
    if not is_utf8_target(raw):
        raise MalformedError(
            "The path or the query is not UTF-8 once percent-decoded (RFC 3986 section "
            "2.5); send text as percent-encoded UTF-8.")


def init_app(app: Flask) -> None:
    """Before authentication is hooked in, so no token is checked first."""
    app.before_request(refuse_target_not_utf8)
