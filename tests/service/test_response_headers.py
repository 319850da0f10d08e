"""Headers every answer carries: the security headers and X-Request-Id.

Both are added in front of Flask (WSGI middleware), so answers that no view
made (an unhandled error, a refused token, an unknown path) are covered too.
Our own contract; no outside reference.
"""

from __future__ import annotations

from pathlib import Path

from flask import Response

from service.web.app import SECURITY_HEADERS
from service.web.auth import public
from tests.service.conftest import build_app


def test_errors_made_outside_any_view_carry_both(tmp_path: Path) -> None:
    app = build_app(f"sqlite:///{tmp_path}/k.db", TESTING=False)

    @public
    def explode() -> str:
        raise RuntimeError("boom")

    app.add_url_rule("/explode", "explode", explode)
    client = app.test_client()
    for path, status in [("/explode", 500), ("/v1/models", 401), ("/nowhere", 404)]:
        response = client.get(path)
        assert response.status_code == status
        for name, value in SECURITY_HEADERS.items():
            assert response.headers.get(name) == value, (path, name)
        assert len(response.headers.getlist("X-Request-Id")) == 1
        assert len(response.headers["X-Request-Id"]) == 32


def test_a_view_that_sets_a_security_header_keeps_its_own_value(tmp_path: Path) -> None:
    app = build_app(f"sqlite:///{tmp_path}/k.db")

    @public
    def framed() -> Response:
        answer = Response("{}", mimetype="application/json")
        answer.headers["cache-control"] = "max-age=60"  # any spelling of the name
        return answer

    app.add_url_rule("/framed", "framed", framed)
    response = app.test_client().get("/framed")
    assert response.headers.getlist("Cache-Control") == ["max-age=60"]
    assert response.headers["X-Frame-Options"] == "DENY"


def test_the_request_id_is_the_same_in_the_answer_and_the_logs(tmp_path: Path) -> None:
    from service.web.observability import current_request_id

    app = build_app(f"sqlite:///{tmp_path}/k.db")
    seen: list[str | None] = []

    @public
    def who() -> dict[str, str]:
        seen.append(current_request_id())
        return {}

    app.add_url_rule("/who", "who", who)
    client = app.test_client()
    fresh = client.get("/who")
    given = client.get("/who", headers={"X-Request-Id": "abc-123"})
    assert seen == [fresh.headers["X-Request-Id"], "abc-123"]
    assert given.headers["X-Request-Id"] == "abc-123"
