"""Bearer tokens (RFC 6750) and the scope every route declares.

Each view declares its scope with ``@requires("predict")`` or ``@public``; one
``before_request`` hook enforces it before the body is read, and a route that
declares nothing is refused (fail closed), so a forgotten declaration cannot
open a route. Tokens are stored only as SHA-256 hashes; the environment's
admin token is compared in constant time. ``admin`` implies every scope.

A token limited to models reaches a route about a model (a ``name`` in its
path) only for one of its models, and gets the very 404 a model that does not
exist gets for every other, so it learns nothing of them. A route without a
model in its path is refused to such a token (403, fail closed) unless its
view declares ``@filters_by_model`` and applies ``token_models()`` itself
(the model list, a job). The check is a set lookup on what the token cache
already holds: no query of its own.
"""

from __future__ import annotations

import hmac
import time
from collections.abc import Callable
from typing import Any, NamedTuple, TypeVar

from flask import Flask, current_app, g, request
from sqlalchemy import select
from werkzeug.exceptions import InternalServerError

from service.errors import ForbiddenError, UnauthorizedError
from service.store.tables import TokenRow
from service.usecases.common import no_such_model
from service.usecases.tokens import SCOPES, hash_token
from service.web.extensions import get_database

PUBLIC = "public"
# Pages (service/web/pages) are reached with a signed session cookie, not a
# bearer token: their blueprint checks the session and its scope itself.
PAGE = "page"
SCOPE_ATTRIBUTE = "keelson_scope"
FILTERS_ATTRIBUTE = "keelson_filters_by_model"
CACHE_KEY = "keelson.tokens"
ADMIN_DIGEST_KEY = "keelson.admin_token_digest"
CACHE_LIMIT = 1024

F = TypeVar("F", bound=Callable[..., Any])


def requires(scope: str) -> Callable[[F], F]:
    """Declare that a view needs ``scope`` (``admin`` tokens pass every check)."""
    if scope not in SCOPES:
        raise ValueError(f"unknown scope {scope!r}")

    def declare(view: F) -> F:
        setattr(view, SCOPE_ATTRIBUTE, scope)
        return view

    return declare


def public(view: F) -> F:
    """Declare that a view needs no token (health, readiness, the API document)."""
    setattr(view, SCOPE_ATTRIBUTE, PUBLIC)
    return view


def page(view: F) -> F:
    """Declare that a view is a page: its blueprint checks the session."""
    setattr(view, SCOPE_ATTRIBUTE, PAGE)
    return view


def filters_by_model(view: F) -> F:
    """Declare that a view without a model in its path applies the token's
    model limits itself (through ``token_models()``)."""
    setattr(view, FILTERS_ATTRIBUTE, True)
    return view


def token_name() -> str | None:
    """The name of the request's token (None on a public route)."""
    name: str | None = g.get("token_name")
    return name


def token_models() -> frozenset[str] | None:
    """The models the request's token is limited to; None when it is not."""
    models: frozenset[str] | None = g.get("token_models")
    return models


class Grant(NamedTuple):
    """What a token may do: its scopes, and its models (None: every model);
    and its name, which a model's history records for an admin act."""

    scopes: frozenset[str]
    models: frozenset[str] | None
    name: str = ""


# The token from the configuration has no row, so no name of its own.
ADMIN_TOKEN_NAME = "KEELSON_ADMIN_TOKEN"
_EVERYTHING = Grant(frozenset(SCOPES), None, ADMIN_TOKEN_NAME)


def declared_scope(view: Callable[..., Any] | None) -> str | None:
    """What a view declared: a scope, ``PUBLIC``, or None when it declared nothing."""
    return getattr(view, SCOPE_ATTRIBUTE, None)


def allows(granted: frozenset[str], needed: str) -> bool:
    return "admin" in granted or needed in granted


class _TokenCache:
    """Token hash -> grant, each entry trusted for ``ttl`` seconds, so a busy
    client costs one token query per second instead of one per request. A
    revocation is therefore seen within ``ttl``; unknown tokens are not cached."""

    def __init__(self, ttl: float) -> None:
        self.ttl = ttl
        self.entries: dict[str, tuple[Grant, float]] = {}

    def get(self, digest: str) -> Grant | None:
        entry = self.entries.get(digest)
        if entry is None or entry[1] < time.monotonic():
            return None
        return entry[0]

    def put(self, digest: str, grant: Grant) -> None:
        if len(self.entries) >= CACHE_LIMIT:
            self.entries.clear()
        self.entries[digest] = (grant, time.monotonic() + self.ttl)


def _bearer_token() -> str | None:
    # The WSGI variable itself: the header view would rebuild its name per call.
    header: str = request.environ.get("HTTP_AUTHORIZATION", "")
    scheme, _, token = header.partition(" ")
    # RFC 7235: the scheme name is case-insensitive.
    if scheme.lower() != "bearer" or not token.strip():
        return None
    return token.strip()


def grant_for_token(token: str) -> Grant | None:
    """What a presented token may do, or None when it is unknown or revoked."""
    return grant_for_digest(hash_token(token))


def grant_for_digest(digest: str) -> Grant | None:
    """What the token with this SHA-256 digest may do (the cache's answer when
    fresh), or None when it is unknown or revoked. A page session keeps the
    digest, never the token, and is checked here on every request."""
    extensions = current_app.extensions
    admin_digest = extensions[ADMIN_DIGEST_KEY]  # hashed once, at init_app
    if admin_digest and hmac.compare_digest(digest, admin_digest):
        return _EVERYTHING
    cache: _TokenCache = extensions[CACHE_KEY]
    cached = cache.get(digest)
    if cached is not None:
        return cached
    with get_database().read() as session:
        row = session.execute(
            select(TokenRow.token_hash, TokenRow.scopes, TokenRow.models,
                   TokenRow.name).where(
                TokenRow.token_hash == digest, TokenRow.revoked_at.is_(None)
            )
        ).first()
    # The lookup is by hash; comparing again in constant time costs nothing and
    # keeps the check honest should the lookup ever become a prefix match.
    if row is None or not hmac.compare_digest(row.token_hash, digest):
        return None
    grant = Grant(frozenset(row.scopes),
                  None if row.models is None else frozenset(row.models), row.name)
    cache.put(digest, grant)
    return grant


def _challenge(error: str | None = None, scope: str | None = None) -> dict[str, str]:
    # RFC 6750 section 3: the challenge names the realm, and the error once a
    # token was presented.
    parts = ['Bearer realm="keelson"']
    if error:
        parts.append(f'error="{error}"')
    if scope:
        parts.append(f'scope="{scope}"')
    return {"WWW-Authenticate": ", ".join(parts)}


def authenticate() -> None:
    """``before_request``: check the matched route's declared scope."""
    if request.routing_exception is not None:
        return  # 404 or 405: answered as such, no token needed to learn it
    view = current_app.view_functions.get(request.endpoint or "")
    needed = declared_scope(view)
    if needed is None:
        raise InternalServerError(f"route {request.endpoint!r} declares no scope")
    if needed in (PUBLIC, PAGE):
        return
    token = _bearer_token()
    granted = grant_for_token(token) if token else None
    if granted is None:
        detail = (
            "A valid bearer token is required." if token is None
            else "The bearer token is unknown or revoked."
        )
        raise UnauthorizedError(
            detail, headers=_challenge("invalid_token" if token else None)
        )
    if granted.models is not None:
        _check_model_limits(granted.models, view)
    if not allows(granted.scopes, needed):
        raise ForbiddenError(
            f"This token lacks the {needed!r} scope.",
            headers=_challenge("insufficient_scope", needed),
        )
    g.token_models = granted.models
    g.token_name = granted.name


def _check_model_limits(models: frozenset[str], view: Callable[..., Any] | None) -> None:
    # Before the scope: another model is 404 whatever the token's scopes, the
    # answer a model that does not exist gets (docs/http-api.md, "Auth and scopes").
    name = (request.view_args or {}).get("name")
    if name is not None:
        if name not in models:
            raise no_such_model(name)
    elif not getattr(view, FILTERS_ATTRIBUTE, False):
        raise ForbiddenError("This token is limited to models; this route needs a token "
                             "that is not.")


def init_app(app: Flask) -> None:
    admin_token = app.config.get("KEELSON_ADMIN_TOKEN")
    app.extensions[ADMIN_DIGEST_KEY] = hash_token(admin_token) if admin_token else None
    app.extensions[CACHE_KEY] = _TokenCache(float(app.config["KEELSON_TOKEN_CACHE_SECONDS"]))
    app.before_request(authenticate)
