"""The pages: server-rendered HTML for the people who act on the scores.

Jinja templates, one stylesheet and two scripts of our own, and one charting
library vendored as a single built file (static/uplot/, its licence beside
it; docs/references.md). Nothing is fetched from another origin, and every
table reads with scripts off. A page is reached with a signed session cookie
(session.py), not a bearer token; its view declares ``@page`` to the API's
gate and its page scope here (``look`` with predict, ``act`` with admin).
"""

from __future__ import annotations

from flask import Flask

from service.web.pages.guard import blueprint

__all__ = ["blueprint", "init_app"]


def init_app(app: Flask) -> None:
    # Imported for its routes: the what-if page and the assets.
    from service.web.pages import assets, views, what_if  # noqa: F401

    app.register_blueprint(blueprint)
