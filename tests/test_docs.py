"""The project's own documents point at things that exist, and the HTTP
contract's scope table is the one the views declare (tests/service/test_auth.py
checks that the app behaves so).

Our own contract (docs/http-api.md, "Auth and scopes"); no outside source.
"""

from __future__ import annotations

import re
from pathlib import Path

from flask import Flask

from service.web import auth
from tests.contract import NO_TOKEN, documented_scopes, route_key

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


# A page's need (service/web/pages/guard.py) as the scope table words it.
PAGE_WORDS = {"open": "page: none", "look": "page: predict", "act": "page: admin"}


def _declared_scopes(app: Flask) -> dict[tuple[str, str], str]:
    from service.web.pages.guard import NEEDS

    declared: dict[tuple[str, str], str] = {}
    for rule in app.url_map.iter_rules():
        view = app.view_functions.get(rule.endpoint)
        scope = auth.declared_scope(view)
        if scope == auth.PAGE:
            scope = PAGE_WORDS[getattr(view, NEEDS)]
        for method in sorted((rule.methods or set()) - {"HEAD", "OPTIONS"}):
            declared[route_key(method, rule.rule)] = (
                NO_TOKEN if scope == auth.PUBLIC else str(scope))
    return declared


def test_the_documented_scopes_are_the_declared_ones(sqlite_url: str) -> None:
    from service.web.app import create_app

    app = create_app({"KEELSON_DATABASE_URL": sqlite_url})
    assert documented_scopes() == _declared_scopes(app)
