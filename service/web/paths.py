"""A request path is routed as sent: never rewritten, never redirected.

* werkzeug's router merges repeated slashes and adds or drops trailing ones by
  answering 308, before any view or authentication runs, with an absolute
  ``Location`` built from the ``Host`` header the client chose (``//v1/models``
  sent with ``Host: evil.example`` was sent to ``http://evil.example/...``).
  Every such redirect is off here: a path that is not a route's is a 404.
* The server decodes ``%2F`` to ``/`` before routing (WSGI's PATH_INFO is
  decoded), so ``station-risk%2Fversions`` reached the versions route. A path
  holding an encoded slash or backslash is refused (400) from the raw request
  target, before authentication; no name Keelson accepts contains either.
* A model's name in a path is a ``<model:name>`` segment, so the published
  document states the model-name pattern; a segment outside it is a 404 that
  names it (``find_model``), like any model that does not exist.
"""

from __future__ import annotations

import re
from typing import Any

from flask import Flask, request
from werkzeug.routing import BaseConverter

from service.errors import MalformedError
from service.usecases.common import MODEL_NAME_PATTERN

_ENCODED_SEPARATOR = re.compile(r"%(?:2f|5c)", re.IGNORECASE)


def refuse_encoded_separators() -> None:
    """``before_request``, registered first: 400 for %2F or %5C in the path."""
    environ = request.environ
    # The undecoded target: gunicorn's RAW_URI, or REQUEST_URI (werkzeug's servers).
    raw: str = environ.get("RAW_URI") or environ.get("REQUEST_URI") or ""
    if "%" in raw and _ENCODED_SEPARATOR.search(raw.partition("?")[0]):
        raise MalformedError(
            "The path holds an encoded slash or backslash (%2F, %5C); send each "
            "name as one path segment without them.")


class ModelNameConverter(BaseConverter):
    """``<model:name>``: a path segment naming a model. It matches any
    segment, as the default converter does, so the use case answers a name
    that could never be a model with the same 404 as an unknown one."""


def model_name_parameter(converter: Any) -> dict[str, Any]:
    """The OpenAPI schema of a ``<model:...>`` path parameter."""
    return {"type": "string", "pattern": f"^{MODEL_NAME_PATTERN}$"}


def init_app(app: Flask) -> None:
    """Before any rule is added and before authentication is hooked in."""
    app.url_map.merge_slashes = False
    app.url_map.strict_slashes = False
    app.url_map.redirect_defaults = False
    app.url_map.converters["model"] = ModelNameConverter
    app.before_request(refuse_encoded_separators)
