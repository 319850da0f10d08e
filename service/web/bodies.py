"""Strict JSON request bodies (RFC 8259).

Python's parser accepts ``NaN``, ``Infinity`` and ``-Infinity``; JSON does not
(RFC 8259 section 6). They are caught while parsing and reported at their
field path (422), so a client learns *which* value was wrong. Bodies must be
UTF-8 with a JSON media type (else 415), and nest at most ``MAX_DEPTH`` deep.
"""

from __future__ import annotations

import json
import re
from typing import Any

from service.errors import InvalidInputError, MalformedError, UnsupportedMediaError

MAX_DEPTH = 32
_OTHER_BYTES = bytes(b for b in range(256) if b not in b'[]{}"')
_STRING = re.compile(rb'"[^"]*"')
_INNERMOST = re.compile(rb"\[\]|\{\}")


class NonFiniteLiteral:
    """Stands in for a ``NaN``/``Infinity`` literal until its path is found."""

    __slots__ = ("literal",)

    def __init__(self, literal: str) -> None:
        self.literal = literal


def is_json_mimetype(mimetype: str) -> bool:
    return mimetype == "application/json" or (
        mimetype.startswith("application/") and mimetype.endswith("+json")
    )


def require_json(mimetype: str, charset: str | None) -> None:
    """415 unless the request says it is UTF-8 JSON."""
    if not is_json_mimetype(mimetype):
        raise UnsupportedMediaError(
            f"Send the body as application/json, not {mimetype or 'without a media type'}."
        )
    if charset and charset.lower() not in ("utf-8", "utf8"):
        raise UnsupportedMediaError("JSON bodies must be UTF-8 (RFC 8259 section 8.1).")


def nesting_depth_exceeds(data: bytes, limit: int = MAX_DEPTH) -> bool:
    """True when brackets nest deeper than ``limit`` (strings ignored).

    Runs in C passes over the bytes: drop escaped backslashes, then escaped
    quotes (in that order, so pairs match left to right as in JSON), keep only
    brackets and quotes, drop strings, then peel innermost pairs ``limit``
    times; anything left nests deeper than that.
    """
    unescaped = data.replace(b"\\\\", b"").replace(b'\\"', b"")
    brackets = _STRING.sub(b"", unescaped.translate(None, _OTHER_BYTES))
    for _ in range(limit):
        if not brackets:
            return False
        brackets, count = _INNERMOST.subn(b"", brackets)
        if count == 0:
            return False  # unbalanced; the parser will say so
    return bool(brackets)


def loads_strict(data: bytes) -> Any:
    """Parse a JSON body; MalformedError (400) or InvalidInputError (422)."""
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise MalformedError(f"The body is not UTF-8 (RFC 8259 section 8.1): {exc}") from exc
    if nesting_depth_exceeds(data):
        raise MalformedError(f"The body nests deeper than {MAX_DEPTH} levels.")
    found = False

    def non_finite(literal: str) -> NonFiniteLiteral:
        nonlocal found
        found = True
        return NonFiniteLiteral(literal)

    try:
        value = json.loads(text, parse_constant=non_finite)
    except RecursionError as exc:
        raise MalformedError("The body nests too deeply.") from exc
    except ValueError as exc:
        raise MalformedError(f"The body is not valid JSON: {exc}") from exc
    if found:
        errors = {
            path or "body": [f"{literal} is not a JSON number (RFC 8259 section 6)."]
            for path, literal in _non_finite_paths(value, "")
        }
        raise InvalidInputError("The body holds numbers JSON does not allow.", errors=errors)
    return value


def _non_finite_paths(value: Any, path: str) -> list[tuple[str, str]]:
    if isinstance(value, NonFiniteLiteral):
        return [(path, value.literal)]
    if isinstance(value, dict):
        items: Any = value.items()
    elif isinstance(value, list):
        items = enumerate(value)
    else:
        return []
    found: list[tuple[str, str]] = []
    for key, item in items:
        found.extend(_non_finite_paths(item, f"{path}.{key}" if path else str(key)))
    return found
