"""Strict JSON request bodies (RFC 8259).

Python's parser accepts ``NaN``, ``Infinity`` and ``-Infinity``; JSON does not
(RFC 8259 section 6). They are caught while parsing and reported at their
field path (422), so a client learns *which* value was wrong. Bodies must be
UTF-8 with a JSON media type (else 415), and nest at most ``MAX_DEPTH`` deep.
A string or member name spelling a lone surrogate breaks the text rule
(``service.text``) and is reported at its path the same way (422).

A body that cannot be read is answered in our own words (where it broke), not
with the parser's message.
"""

from __future__ import annotations

import json
import re
from typing import Any

from service.errors import InvalidInputError, MalformedError, UnsupportedMediaError
from service.text import NOT_SCALAR_TEXT, non_scalar_paths

MAX_DEPTH = 32
_OTHER_BYTES = bytes(b for b in range(256) if b not in b'[]{}"')
_STRING = re.compile(rb'"[^"]*"')
_INNERMOST = re.compile(rb"\[\]|\{\}")
# A JSON escape of a lone surrogate (RFC 8259 section 7: "\u" and four hex
# digits): a high one not followed by a low one, or a low one not after a high
# one (the parser pairs a high escape with the low escape right after it).
# Only a body holding one can break the text rule, so only such a body is
# walked to name the paths; escaped pairs, as many clients send any character
# beyond U+FFFF, cost no walk. An escaped backslash could make "\\ud83d" text
# look like half a pair, so a body holding one is walked on any surrogate
# escape (a match that is not one only costs the walk, which finds nothing).
_LONE_SURROGATE_ESCAPE = re.compile(
    rb"\\u[dD](?:"
    rb"[89abAB][0-9a-fA-F]{2}(?!\\u[dD][c-fC-F])"  # a high one, no low one next
    rb"|(?<!\\u[dD][89abAB][0-9a-fA-F]{2}\\u[dD])[c-fC-F][0-9a-fA-F]{2})")  # a low one alone
_SURROGATE_ESCAPE = re.compile(rb"\\u[dD][89a-fA-F]")


def may_hold_lone_surrogates(data: bytes) -> bool:
    """False when the JSON text ``data`` surely spells no lone surrogate."""
    if b"\\" not in data:
        return False  # the common case: no escape at all (one memchr, under 1 us per 100 KB)
    escapes = _SURROGATE_ESCAPE if b"\\\\" in data else _LONE_SURROGATE_ESCAPE
    return escapes.search(data) is not None


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
        raise MalformedError(not_utf8("The body", exc, "RFC 8259 section 8.1")) from None
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
    except json.JSONDecodeError as exc:
        raise MalformedError(
            f"The body is not valid JSON: line {exc.lineno}, column {exc.colno}.") from None
    except ValueError:  # an integer beyond what the parser reads (thousands of digits)
        raise MalformedError("The body is not valid JSON: a number has too many digits.") from None
    errors: dict[str, list[str]] = {}
    if found:
        for path, literal in _non_finite_paths(value, ""):
            errors[path or "body"] = [f"{literal} is not a JSON number (RFC 8259 section 6)."]
    if may_hold_lone_surrogates(data):
        for path in non_scalar_paths(value):
            errors.setdefault(path, []).append(NOT_SCALAR_TEXT)
    if errors:
        raise InvalidInputError("The body holds numbers JSON does not allow." if found else
                                "The body holds text that is not valid Unicode.", errors=errors)
    return value


def not_utf8(what: str, exc: UnicodeDecodeError, source: str) -> str:
    """Where bytes that are not UTF-8 begin, in our words (byte 1 is the first)."""
    return f"{what} is not UTF-8 ({source}): byte {exc.start + 1} is not part of a UTF-8 character."


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
