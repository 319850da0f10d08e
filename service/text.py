"""The text rule: every string the service takes is Unicode scalar values.

A JSON string may spell a lone surrogate (``"\\ud800"``): a code point that
only exists to pair up in UTF-16 and is no character. RFC 8259 section 8.2
leaves what a receiver then does unpredictable, RFC 7493 (I-JSON) section 2.1
says such strings MUST NOT appear; Python's parser reads them into ``str``, and
nothing downstream can encode them again (a stored spec the worker could not
decode; an error answer that failed while naming the field). UTF-8 itself
cannot carry one (RFC 3629 section 3), so bytes that are strictly UTF-8 never
hold one; only a JSON escape can bring one in.

So the rule is checked where text enters: JSON bodies as they are parsed
(``service.web.bodies``, every member name and string value, the error naming
its path); the request target (``service.web.request_target``: percent-decoded,
the path and the query must be UTF-8); CSV bodies and files are decoded
strictly as UTF-8; a token's name from the command line (``usecases.tokens``;
Python reads undecodable argument bytes as lone surrogates). Everything past
those doors may assume scalar text.

Any answer that shows such text (an error naming a field it refused) shows it
escaped, as the six characters ``\\ud800`` (``shown``): an answer is always
valid UTF-8.
"""

from __future__ import annotations

import re
from typing import Any

_SURROGATE = re.compile("[\ud800-\udfff]")
NOT_SCALAR_TEXT = ("Not valid Unicode text: a lone surrogate (U+D800 to U+DFFF) is no "
                   "character (RFC 8259 section 8.2, RFC 7493 section 2.1).")


def is_scalar_text(text: str) -> bool:
    """Whether ``text`` is Unicode scalar values only (no lone surrogate).

    ASCII is answered by one C-level scan; anything else by one regex search,
    no copy.
    """
    return text.isascii() or _SURROGATE.search(text) is None


def shown(text: str) -> str:
    """``text`` with each surrogate written as the escape that spells it
    (``\\ud800``, a backslash and five characters): safe in any answer."""
    if is_scalar_text(text):
        return text
    return text.encode("utf-8", "backslashreplace").decode("utf-8")


def shown_value(value: Any) -> Any:
    """``value`` (JSON-shaped: dicts, lists, scalars) with every string,
    member names included, passed through ``shown``."""
    if isinstance(value, str):
        return shown(value)
    if isinstance(value, dict):
        return {shown_value(key): shown_value(item) for key, item in value.items()}
    if isinstance(value, list | tuple):
        return [shown_value(item) for item in value]
    return value


def non_scalar_paths(value: Any, path: str = "") -> list[str]:
    """The paths (``classes.1``, ``records.0.features.x\\ud800``) of every
    string or member name in a parsed JSON ``value`` that breaks the rule; a
    path is given ``shown``. Empty when the text is all valid."""
    found: list[str] = []
    _collect(value, path, found)
    return found


def _collect(value: Any, path: str, found: list[str]) -> None:
    if isinstance(value, str):
        if not is_scalar_text(value):
            found.append(path or "body")
    elif isinstance(value, dict):
        for key, item in value.items():
            child = f"{path}.{shown(key)}" if path else shown(key)
            if not is_scalar_text(key):
                found.append(child)
            else:
                _collect(item, child, found)
    elif isinstance(value, list):
        for index, item in enumerate(value):
            _collect(item, f"{path}.{index}" if path else str(index), found)
