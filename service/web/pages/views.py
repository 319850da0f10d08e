"""The pages: signing in and out, the overview, a model's page and its two
admin forms (make a version active, start a retrain).

The forms act through the same use cases as the API routes (promote with a
reason, queue a retrain), recorded in the model's history under the token's
name; then the browser is sent back to the model page (303, POST/redirect/GET).
"""

from __future__ import annotations

from typing import Any

from flask import Response, g, jsonify, make_response, redirect, render_template, request

from service.errors import InvalidInputError
from service.usecases import jobs, versions
from service.web.extensions import get_database, get_drift_references, get_version_cache
from service.web.pages import page_data, session
from service.web.pages.guard import acts, blueprint, looks, open_page
from service.web.pages.numbers import numeric_bins

MAX_REASON = 1000


@blueprint.route("/sign-in", methods=["GET"])
@open_page
def sign_in_form() -> Response:
    if session.current() is not None:
        return redirect("/", 303)  # type: ignore[return-value]
    return _sign_in_page(None, 200)


def _sign_in_page(problem: str | None, status: int) -> Response:
    response = make_response()
    nonce = session.sign_in_nonce(response)
    response.set_data(render_template("sign_in.html", problem=problem,
                                      sign_in_csrf=session.csrf_token(nonce)))
    response.status_code = status
    return response


@blueprint.route("/sign-in", methods=["POST"])
@open_page
def sign_in() -> Response:
    token = request.form.get("token", "").strip()
    response = redirect("/", 303)
    if not token or len(token) > 512 or not session.start(response, token):
        return _sign_in_page("That token is unknown, revoked, or may not look at models.",
                             401)
    return response  # type: ignore[return-value]


@blueprint.route("/sign-out", methods=["POST"])
@looks
def sign_out() -> Response:
    response = redirect("/sign-in", 303)
    session.end(response, g.page_user.nonce)
    return response  # type: ignore[return-value]


@blueprint.route("/", methods=["GET"])
@looks
def overview() -> str:
    rows = page_data.overview(get_database(), get_version_cache(), get_drift_references(),
                              g.page_user.grant.models)
    return render_template("overview.html", models=rows)


@blueprint.route("/models/<model:name>", methods=["GET"])
@looks
def model_page(name: str) -> str:
    data = page_data.model_page(get_database(), get_version_cache(), get_drift_references(),
                                name, all_versions=request.args.get("versions") == "all")
    drift = data["drift"]
    if drift is not None and drift.get("earlier"):
        drift = drift["earlier"]  # what the page's drift section shows (drift.html)
    numeric = [] if drift is None else [f["name"] for f in drift["fields"]
                                        if f["type"] == "numeric"]
    chosen = request.args.get("field")
    if chosen not in numeric:
        chosen = numeric[0] if numeric else None
    shown = None if drift is None or chosen is None else next(
        f for f in drift["fields"] if f["name"] == chosen)
    return render_template("model.html", name=name, data=data, numeric_fields=numeric,
                           chosen_field=chosen, distribution=shown,
                           ranges=None if shown is None else numeric_bins(shown["bins"]),
                           may_act=g.page_user.may("admin"))


def _reason() -> str | None:
    reason = request.form.get("reason", "").strip()
    if len(reason) > MAX_REASON:
        raise InvalidInputError(f"A reason is at most {MAX_REASON} characters.")
    return reason or None


@blueprint.route("/models/<model:name>/versions/<int:number>/activate", methods=["POST"])
@acts
def activate(name: str, number: int) -> Response:
    reason = _reason()
    if reason is None:
        raise InvalidInputError("Say why this version should serve: a reason is required.")
    if request.form.get("confirm") != "yes":
        raise InvalidInputError("Tick the box to confirm that this version should serve.")
    versions.promote_version(get_database(), name, number, token=g.page_user.grant.name,
                             reason=reason)
    return redirect(f"/models/{name}#versions", 303)  # type: ignore[return-value]


@blueprint.route("/models/<model:name>/retrains", methods=["GET"])
@looks
def list_retrains(name: str) -> Response:
    """The model's latest retrains as JSON, for the page's refresh."""
    return jsonify({"jobs": page_data.recent_jobs(get_database(), name)})


@blueprint.route("/models/<model:name>/retrains", methods=["POST"])
@acts
def retrain(name: str) -> Response:
    jobs.request_retrain(get_database(), name, warm_start=request.form.get("warm_start") == "yes",
                         token=g.page_user.grant.name, reason=_reason())
    return redirect(f"/models/{name}#retrains", 303)  # type: ignore[return-value]


def chart_json(value: Any) -> str:
    """Data for a chart, as the text of a data-* attribute (Jinja escapes it)."""
    import json

    return json.dumps(value, separators=(",", ":"), allow_nan=False)


blueprint.add_app_template_filter(chart_json, "chart_json")
