"""/assets/...: the pages' stylesheet, scripts and the vendored chart library.

Served from the package (no other origin), public (the sign-in page needs its
stylesheet), by name from a fixed list, so no path from a request reaches the
file system. Each answer may be cached for an hour: the files change only
with a release.
"""

from __future__ import annotations

from pathlib import Path

from flask import Response, send_file

from service.errors import NotFoundError
from service.web.pages.guard import blueprint, open_page

STATIC = Path(__file__).resolve().parent / "static"
FILES = {
    "keelson.css": STATIC / "keelson.css",
    "pages.js": STATIC / "pages.js",
    "uPlot.iife.min.js": STATIC / "uplot" / "uPlot.iife.min.js",
    "uPlot.min.css": STATIC / "uplot" / "uPlot.min.css",
}


@blueprint.route("/assets/<filename>", methods=["GET"])
@open_page
def asset(filename: str) -> Response:
    path = FILES.get(filename)
    if path is None:
        raise NotFoundError(f"No asset named {filename!r}.")
    response = send_file(path, max_age=3600)
    response.headers["Cache-Control"] = "public, max-age=3600"
    return response

