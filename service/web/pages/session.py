"""A page session: a signed cookie naming a token by its digest, and CSRF.

The cookie holds the SHA-256 digest of the token a person pasted (the form the
store already keeps), a random nonce and the time it was signed; never the
token itself. It is signed with the site key (itsdangerous, HMAC-SHA1 over a
derived key, the scheme Flask's own sessions use) and read back only within
``KEELSON_SESSION_HOURS``. On every request the digest is looked up as a
bearer token is (service.web.auth.grant_for_digest, through the token cache),
so revoking the token ends its sessions within ``KEELSON_TOKEN_CACHE_SECONDS``;
signing out records the session's nonce as ended (table ``ended_sessions``),
so a copy of the cookie is refused too.

CSRF: every form that changes something carries an HMAC of the session's nonce
(the sign-in form: of a nonce in a cookie of its own, set with the form). A
POST whose token does not match, or whose ``Origin`` (or ``Sec-Fetch-Site``)
says another site sent it, is refused with 403 before anything is read.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import secrets
from typing import Any, NamedTuple
from urllib.parse import urlsplit

from flask import Flask, current_app, g, request
from itsdangerous import BadSignature, URLSafeTimedSerializer
from sqlalchemy import delete, select
from sqlalchemy.exc import IntegrityError
from werkzeug.wrappers import Response

from service.errors import ForbiddenError
from service.store.database import transaction
from service.store.tables import EndedSessionRow, SiteSecretRow
from service.web.auth import Grant, grant_for_digest
from service.web.extensions import get_database

COOKIE = "keelson_session"
SIGN_IN_COOKIE = "keelson_sign_in"
CSRF_FIELD = "csrf_token"
KEY_NAME = "page_session_key"
_KEY = "keelson.page_key"
_SALT = "keelson.page-session"


class PageSession(NamedTuple):
    """The signed-in person: their token's grant, and the nonce CSRF tokens
    are made from."""

    grant: Grant
    digest: str
    nonce: str

    def may(self, scope: str) -> bool:
        return "admin" in self.grant.scopes or scope in self.grant.scopes

    def sees(self, model: str) -> bool:
        return self.grant.models is None or model in self.grant.models


def site_key(app: Flask) -> bytes:
    """KEELSON_SECRET_KEY, or the key kept in the database (made by the first
    process that needed one; a process that loses the race reads the winner's)."""
    key: bytes | None = app.extensions.get(_KEY)
    if key is not None:
        return key
    configured = app.config.get("KEELSON_SECRET_KEY")  # 32 characters or more (config)
    key = configured.encode() if configured else _stored_key(app).encode()
    app.extensions[_KEY] = key
    return key


def _stored_key(app: Flask) -> str:
    database = get_database(app)
    with database.read() as session:
        value = session.scalar(select(SiteSecretRow.value).where(SiteSecretRow.name == KEY_NAME))
    if value is not None:
        return value
    try:
        with transaction(database.write) as session:
            session.add(SiteSecretRow(name=KEY_NAME, value=secrets.token_urlsafe(48)))
    except IntegrityError:
        pass  # another process stored one first: use it
    with database.read() as session:
        stored = session.scalar(
            select(SiteSecretRow.value).where(SiteSecretRow.name == KEY_NAME))
    if stored is None:
        raise RuntimeError("the page session key could not be stored")
    return stored


def _serializer() -> URLSafeTimedSerializer:
    return URLSafeTimedSerializer(site_key(current_app), salt=_SALT)


def _lifetime() -> int:
    return int(float(current_app.config["KEELSON_SESSION_HOURS"]) * 3600)


def _secure() -> bool:
    return request.is_secure


def current() -> PageSession | None:
    """This request's session (checked once per request), or None."""
    if "page_session" in g:
        found: PageSession | None = g.page_session
        return found
    g.page_session = _read(request.cookies.get(COOKIE))
    return g.page_session  # type: ignore[no-any-return]


def _read(cookie: str | None) -> PageSession | None:
    if not cookie:
        return None
    try:
        data: Any = _serializer().loads(cookie, max_age=_lifetime())
        digest, nonce = str(data["d"]), str(data["n"])
    except (BadSignature, KeyError, TypeError):
        return None
    with get_database().read() as session:
        if session.get(EndedSessionRow, nonce) is not None:
            return None  # signed out
    grant = grant_for_digest(digest)
    if grant is None or not ({"predict", "admin"} & grant.scopes):
        return None
    return PageSession(grant, digest, nonce)


def start(response: Response, token: str) -> bool:
    """Sign in with ``token``: set the session cookie, or False when the token
    is unknown, revoked or may not look at models."""
    digest = hashlib.sha256(token.encode()).hexdigest()
    grant = grant_for_digest(digest)
    if grant is None or not ({"predict", "admin"} & grant.scopes):
        return False
    value = _serializer().dumps({"d": digest, "n": secrets.token_urlsafe(16)})
    response.set_cookie(COOKIE, value, max_age=_lifetime(), httponly=True,
                        samesite="Strict", secure=_secure(), path="/")
    response.delete_cookie(SIGN_IN_COOKIE, path="/sign-in", httponly=True,
                           samesite="Strict", secure=_secure())
    return True


def end(response: Response, nonce: str) -> None:
    """Sign out: the session's nonce is refused from now on, by every process
    (a copy of the cookie included), and the cookie is deleted."""
    now = dt.datetime.now(dt.UTC)
    with transaction(get_database().write) as session:
        session.execute(delete(EndedSessionRow).where(EndedSessionRow.ends_at < now))
        if session.get(EndedSessionRow, nonce) is None:
            session.add(EndedSessionRow(nonce=nonce,
                                        ends_at=now + dt.timedelta(seconds=_lifetime())))
    response.delete_cookie(COOKIE, path="/", httponly=True, samesite="Strict", secure=_secure())


def sign_in_nonce(response: Response | None = None) -> str:
    """The nonce the sign-in form's CSRF token is made from: the request's
    cookie, or a new one set on ``response``."""
    nonce = request.cookies.get(SIGN_IN_COOKIE)
    if not nonce or len(nonce) > 64:
        nonce = secrets.token_urlsafe(16)
        if response is not None:
            response.set_cookie(SIGN_IN_COOKIE, nonce, max_age=3600, httponly=True,
                                samesite="Strict", secure=_secure(), path="/sign-in")
    return nonce


def csrf_token(nonce: str) -> str:
    return hmac.new(site_key(current_app), b"csrf|" + nonce.encode(), "sha256").hexdigest()


def check_post(nonce: str | None) -> None:
    """403 for a POST another site sent, or one without this session's token."""
    origin = request.headers.get("Origin")
    # The host alone: behind a proxy that ends TLS the scheme seen here differs.
    # "null" is what a browser sends for its own pages under Referrer-Policy:
    # no-referrer (every answer's, service/web/headers.py); Sec-Fetch-Site and
    # the token below still tell this site's forms from another's.
    if origin is not None and origin != "null" and urlsplit(origin).netloc != request.host:
        raise ForbiddenError("This form was sent from another site.")
    if request.headers.get("Sec-Fetch-Site", "same-origin") not in ("same-origin", "none"):
        raise ForbiddenError("This form was sent from another site.")
    sent = request.form.get(CSRF_FIELD, "")
    if nonce is None or not hmac.compare_digest(sent.encode(), csrf_token(nonce).encode()):
        raise ForbiddenError("The form's CSRF token is missing or does not match this "
                             "session; reload the page and send it again.")
