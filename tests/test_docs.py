"""The project's own documents point at things that exist, and the HTTP
contract's scope table is the one the app enforces.

Our own contract (docs/http-api.md, "Auth and scopes"); no outside source.
"""

from __future__ import annotations

import re
from pathlib import Path

from flask import Flask

from service.web import auth

ROOT = Path(__file__).resolve().parents[1]
DOCUMENTS = [ROOT / "README.md", ROOT / "DEVELOPERS.md", *sorted((ROOT / "docs").glob("*.md"))]
REPOSITORY_PATH = re.compile(
    r"(?<![\w./])((?:engine|service|tests|migrations|docker|docs)/[\w./-]*\w)")
LINK = re.compile(r"\]\(([^)#\s]+)")


def test_every_repository_path_a_document_names_exists() -> None:
    missing = {}
    for document in DOCUMENTS:
        text = document.read_text()
        named = set(REPOSITORY_PATH.findall(text))
        named |= {str((document.parent / link).resolve().relative_to(ROOT))
                  for link in LINK.findall(text) if "://" not in link}
        gone = sorted(path for path in named if not (ROOT / path).exists())
        if gone:
            missing[document.name] = gone
    assert missing == {}


def _documented_scopes() -> dict[tuple[str, str], str]:
    text = (ROOT / "docs" / "http-api.md").read_text()
    section = text[text.index("## Auth and scopes"):text.index("## Errors")]
    table: dict[tuple[str, str], str] = {}
    for line in section.splitlines():
        if not line.startswith("| `"):
            continue
        routes, scope = (cell.strip() for cell in line.strip().strip("|").split("|"))
        for route in re.findall(r"`([A-Z]+) ([^`]+)`", routes):
            table[(route[0], re.sub(r"\{[^}]+\}", "{}", route[1]))] = scope
    return table


def _enforced_scopes(app: Flask) -> dict[tuple[str, str], str]:
    enforced: dict[tuple[str, str], str] = {}
    for rule in app.url_map.iter_rules():
        scope = auth.declared_scope(app.view_functions.get(rule.endpoint))
        path = re.sub(r"<[^>]+>", "{}", rule.rule)
        for method in sorted((rule.methods or set()) - {"HEAD", "OPTIONS"}):
            enforced[(method, path)] = "none" if scope == auth.PUBLIC else str(scope)
    return enforced


def test_the_documented_scopes_are_the_enforced_ones(sqlite_url: str) -> None:
    from service.web.app import create_app

    app = create_app({"KEELSON_DATABASE_URL": sqlite_url})
    assert _documented_scopes() == _enforced_scopes(app)
