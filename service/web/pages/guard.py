"""The pages' blueprint and its gate: who may see a page or send its form.

Each page view declares what it needs: ``open_page`` (the sign-in form, the
assets), ``looks`` (a session whose token has ``predict`` or ``admin``) or
``acts`` (``admin``). Fail closed: a view that declares nothing is a 500. A
POST is checked for CSRF before anything else (session.check_post); a token
limited to models gets, for any other model, the 404 an unknown model gets.
Every page answer carries a Content-Security-Policy that lets scripts, styles
and requests come from this origin only.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, TypeVar

from flask import Blueprint, Response, current_app, g, redirect, render_template, request
from werkzeug.exceptions import HTTPException, InternalServerError

from service.errors import ForbiddenError, KeelsonError
from service.usecases.common import no_such_model
from service.web.auth import page
from service.web.pages import session

F = TypeVar("F", bound=Callable[..., Any])
NEEDS = "keelson_page_needs"
OPEN, LOOK, ACT = "open", "look", "act"

# 'self' only: no inline script or style, no other origin, forms post here.
PAGE_CSP = ("default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
            "connect-src 'self'; form-action 'self'; base-uri 'none'; frame-ancestors 'none'")

blueprint = Blueprint("pages", __name__, template_folder="templates")


def _declare(needs: str) -> Callable[[F], F]:
    def declare(view: F) -> F:
        setattr(view, NEEDS, needs)
        return page(view)
    return declare


open_page, looks, acts = _declare(OPEN), _declare(LOOK), _declare(ACT)


@blueprint.before_request
def gate() -> Response | None:
    view = current_app.view_functions.get(request.endpoint or "")
    needs = getattr(view, NEEDS, None)
    if needs is None:
        raise InternalServerError(f"page {request.endpoint!r} declares no need")
    if needs == OPEN:
        if request.method == "POST":
            session.check_post(request.cookies.get(session.SIGN_IN_COOKIE))
        return None
    signed_in = session.current()
    if request.method == "POST":
        session.check_post(None if signed_in is None else signed_in.nonce)
    if signed_in is None:
        return redirect("/sign-in", 303)  # type: ignore[return-value]
    name = (request.view_args or {}).get("name")
    if name is not None and not signed_in.sees(name):
        raise no_such_model(name)
    if needs == ACT and not signed_in.may("admin"):
        raise ForbiddenError("Signed in with a token that may look, not act: this needs "
                             "the 'admin' scope.")
    g.page_user = signed_in
    return None


@blueprint.after_request
def secure(response: Response) -> Response:
    response.headers["Content-Security-Policy"] = PAGE_CSP
    return response


@blueprint.app_context_processor
def page_context() -> dict[str, Any]:
    """What every template may use: the session (None when signed out) and
    the CSRF token of its forms."""
    user = g.get("page_user")
    return {"user": user,
            "csrf_token": "" if user is None else session.csrf_token(user.nonce)}


def _error_page(status: int, title: str, detail: str) -> tuple[str, int]:
    return render_template("error.html", status=status, title=title, detail=detail), status


@blueprint.errorhandler(KeelsonError)
def keelson_error(exc: KeelsonError) -> tuple[str, int]:
    titles = {403: "Refused", 404: "Not found", 409: "Not yet", 422: "Not accepted"}
    return _error_page(exc.status, titles.get(exc.status, "Could not be done"), str(exc))


@blueprint.errorhandler(HTTPException)
def http_error(exc: HTTPException) -> tuple[str, int]:
    status = exc.code or 500
    return _error_page(status, exc.name, "This page could not be shown."
                       if status >= 500 else (exc.description or exc.name))
