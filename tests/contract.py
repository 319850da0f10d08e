"""The HTTP contract as docs/http-api.md states it, read once for every test
that checks the app against it (our own contract; no outside source)."""

from __future__ import annotations

import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
HTTP_API = ROOT / "docs" / "http-api.md"
NO_TOKEN = "none"  # the table's word for a route that needs no token
# The pages (HTML, a session cookie instead of a bearer token): what the
# session's token needs, or nothing (the sign-in form, its assets).
PAGE_SCOPES = ("page: none", "page: predict", "page: admin")


def is_page(scope: str) -> bool:
    return scope in PAGE_SCOPES


def route_key(method: str, template: str) -> tuple[str, str]:
    """(method, path) with every path parameter written ``{}``, so the table's
    ``{name}`` and Flask's ``<int:number>`` compare equal."""
    return method, re.sub(r"\{[^}]+\}|<[^>]+>", "{}", template)


def documented_scopes() -> dict[tuple[str, str], str]:
    """route_key -> scope (``ingest``, ``predict``, ``admin`` or ``none``) from
    the table in the "Auth and scopes" section."""
    text = HTTP_API.read_text()
    section = text[text.index("## Auth and scopes"):text.index("## Errors")]
    table: dict[tuple[str, str], str] = {}
    for line in section.splitlines():
        if not line.startswith("| `"):
            continue
        routes, scope = (cell.strip() for cell in line.strip().strip("|").split("|"))
        for method, template in re.findall(r"`([A-Z]+) ([^`]+)`", routes):
            key = route_key(method, template)
            assert key not in table, f"{method} {template} is in the scope table twice"
            table[key] = scope
    return table
