"""What never reaches a log: secrets a client put in a query string."""

from __future__ import annotations

import re
from urllib.parse import unquote_plus

# RFC 6750 section 2.3 lets clients put a bearer token in the query string as
# access_token; Keelson accepts none there, but a client that tries must not
# leave its secret in the access log. Names are compared decoded (repeatedly:
# access%5Ftoken, access%255Ftoken), lower-cased, letters and digits only.
SECRET_PARAMETERS = frozenset(("accesstoken", "token", "apikey", "key", "auth", "bearer",
                               "authorization", "password", "secret"))
_SECRET_SUFFIXES = ("token", "apikey", "secret", "password")
# Every secret name above, undecoded, contains one of these; names without
# any escape that contain none of them are passed over quickly.
_SECRET_STEMS = ("token", "key", "auth", "bearer", "password", "secret")
_SEPARATORS = re.compile(r"([&;])")
_NOT_ALNUM = re.compile(r"[^a-z0-9]")


def is_secret_parameter(raw_name: str) -> bool:
    name = raw_name
    for _ in range(4):
        decoded = unquote_plus(name)
        if decoded == name:
            break
        name = decoded
    key = _NOT_ALNUM.sub("", name.lower())
    return key in SECRET_PARAMETERS or key.endswith(_SECRET_SUFFIXES)


def redacted_query(query: str) -> str:
    """``query`` with the value of every secret-named parameter replaced."""
    lowered = query.lower()
    if "%" not in query and "+" not in query and not any(s in lowered for s in _SECRET_STEMS):
        return query
    parts = _SEPARATORS.split(query)
    for i in range(0, len(parts), 2):
        name, equals, _ = parts[i].partition("=")
        if equals and is_secret_parameter(name):
            parts[i] = f"{name}=[redacted]"
    return "".join(parts)
