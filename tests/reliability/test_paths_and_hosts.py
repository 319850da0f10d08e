"""Encoded paths and hostile host headers against a real ``keelson serve``.

Held: no answer is a redirect, and no answer carries the ``Host`` (or
``X-Forwarded-Host``, or absolute-form target) the client chose: werkzeug
merged ``//`` with a 308 whose ``Location`` was built from ``Host``, before
authentication. A path segment holding an encoded slash or backslash is a
400 before authentication, instead of being decoded into another route
(``pump-risk%2fversions`` answered the versions list). Our own contract;
RFC 3986 section 2.2 makes ``%2F`` data, not a separator.
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.reliability.harness import ADMIN
from tests.reliability.probes import Answer, ask, assert_usual_answer, predicting_server

pytestmark = pytest.mark.slow
EVIL = "evil.example"
AUTH = {"Authorization": f"Bearer {ADMIN}"}
ODD_PATHS = ["//v1/models", "/v1//models", "/v1/models/", "//healthz", "/healthz/",
             "/./healthz", "/v1/models/pump-risk/../pump-risk", "/v1/models//pump-risk",
             "///metrics", "/v1/models/pump-risk/versions/", "/openapi.json/",
             "/%2e/healthz", "/v1/models/%2e%2e/pump-risk"]
ENCODED = ["/v1/models/pump-risk%2fversions", "/v1/models/pump-risk%2Fversions",
           "/v1/models/pump-risk%5cversions", "/v1/models%2Fpump-risk/versions",
           "/v1/models/pump-risk%2fpredictions?vibration_rms=1&pump_family=screw&has_vfd=true",
           "/healthz%2F"]


@pytest.fixture(scope="module")
def base(sqlite_template: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    folder = tmp_path_factory.mktemp("paths")
    shutil.copyfile(sqlite_template, folder / "keelson.db")
    with predicting_server(f"sqlite:///{folder / 'keelson.db'}", folder) as served:
        yield served


def reflects(answer: Answer, text: str) -> bool:
    return any(text in value for value in answer.headers.values()) or text.encode() in \
        answer.body


@pytest.mark.parametrize("path", ODD_PATHS)
@pytest.mark.parametrize("token", [False, True], ids=["no-token", "token"])
def test_odd_paths_are_never_redirected_nor_reflect_the_host(base: str, path: str,
                                                             token: bool) -> None:
    headers = {"X-Forwarded-Host": EVIL, **(AUTH if token else {})}
    for method in ("GET", "POST"):
        answer = ask(base, method, path, headers, host=EVIL)
        assert not 300 <= answer.status < 400, (method, path, answer.status, answer.headers)
        assert "location" not in answer.headers
        assert not reflects(answer, EVIL), (method, path, answer.headers)
        assert_usual_answer(answer, answer.status)


def test_an_absolute_form_target_is_not_reflected(base: str) -> None:
    for target in (f"http://{EVIL}/healthz", f"http://{EVIL}//v1/models",
                   f"http://{EVIL}/v1/models/"):
        answer = ask(base, "GET", target, AUTH, host=EVIL)
        assert not 300 <= answer.status < 400 and not reflects(answer, EVIL), (target, answer)
        assert_usual_answer(answer, answer.status)


@pytest.mark.parametrize("path", ENCODED)
@pytest.mark.parametrize("token", [False, True], ids=["no-token", "token"])
def test_an_encoded_slash_in_a_path_is_refused_before_anything_else(base: str, path: str,
                                                                   token: bool) -> None:
    answer = ask(base, "GET", path, AUTH if token else {})
    assert_usual_answer(answer, 400)
    assert "encoded slash" in answer.json()["detail"]


def test_encoded_slashes_in_the_query_are_data(base: str) -> None:
    answer = ask(base, "GET", "/v1/models/pump-risk/predictions?vibration_rms=1"
                              "&pump_family=screw%2Fx&has_vfd=true", AUTH)
    assert_usual_answer(answer, 422)  # an unknown level, named as such
    assert "pump_family" in answer.json()["errors"]
