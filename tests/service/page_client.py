"""A browser-like client for the pages over Flask's test client: it keeps
cookies, reads each form's CSRF token from the page, and signs in."""

from __future__ import annotations

import re
from typing import Any

from flask import Flask
from flask.testing import FlaskClient
from werkzeug.test import TestResponse

from tests.service.predictions_factory import (
    add_version,
    pump_rows,
    pump_rule,
    stored_spec,
    train_learner,
)

CSRF = re.compile(r'name="csrf_token" value="([^"]*)"')


def csrf_of(page: TestResponse) -> str:
    found = CSRF.search(page.get_data(as_text=True))
    assert found is not None, "the page has no form with a CSRF token"
    return found.group(1)


class PageClient:
    def __init__(self, app: Flask) -> None:
        self.app = app
        self.client: FlaskClient = app.test_client()

    def sign_in(self, token: str, status: int = 303) -> TestResponse:
        form = self.client.get("/sign-in")
        assert form.status_code == 200
        response = self.client.post("/sign-in", data={"token": token,
                                                      "csrf_token": csrf_of(form)})
        assert response.status_code == status, response.get_data(as_text=True)
        return response

    def get(self, path: str, status: int = 200) -> TestResponse:
        response = self.client.get(path)
        assert response.status_code == status, (path, response.status_code)
        return response

    def post_form(self, page: str, action: str, data: dict[str, Any],
                  status: int = 303, **kwargs: Any) -> TestResponse:
        """POST ``data`` to ``action`` with the CSRF token of the form on ``page``."""
        token = csrf_of(self.get(page))
        response = self.client.post(action, data={"csrf_token": token, **data}, **kwargs)
        assert response.status_code == status, (action, response.status_code,
                                                response.get_data(as_text=True)[:500])
        return response


def served_model(app: Flask, name: str = "pump-risk", versions: int = 2) -> None:
    """``versions`` versions of the model, the first one serving."""
    learner = train_learner(stored_spec(app, name), pump_rows(200, seed=4), pump_rule)
    for number in range(1, versions + 1):
        add_version(app, name, learner.to_bytes(), activate=number == 1,
                    records_seen=100 * number)
