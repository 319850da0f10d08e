"""Lone surrogates against a real ``keelson serve`` (the probes of
test_text_probes.py go through the test client): text reaches the app through
the server's own reading of the request line and body, and every answer is
problem details in strict UTF-8, never a 500.

``%ED%A0%80`` and the raw bytes ``ED A0 80`` are U+D800 as UTF-8 would spell
it, which UTF-8 forbids (RFC 3629 section 3); ``"\\ud800"`` is a JSON escape
of a lone surrogate (RFC 8259 section 8.2; RFC 7493 section 2.1 forbids it).
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest

from service.text import NOT_SCALAR_TEXT
from tests.reliability.harness import ADMIN
from tests.reliability.probes import Answer, ask, assert_usual_answer, predicting_server

pytestmark = pytest.mark.slow
AUTH = {"Authorization": f"Bearer {ADMIN}"}
JSON = {**AUTH, "Content-Type": "application/json"}
QUERY = "vibration_rms=12.5&pump_family=screw&has_vfd=true"


@pytest.fixture(scope="module")
def base(sqlite_template: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    folder = tmp_path_factory.mktemp("text")
    shutil.copyfile(sqlite_template, folder / "keelson.db")
    with predicting_server(f"sqlite:///{folder / 'keelson.db'}", folder) as served:
        yield served


def post(base: str, path: str, headers: dict[str, str], data: bytes) -> Answer:
    return ask(base, "POST", path, {**headers, "Content-Length": str(len(data))}, data)


def strict(answer: Answer, status: int) -> dict[str, object]:
    assert_usual_answer(answer, status)
    parsed: dict[str, object] = json.loads(answer.body.decode("utf-8", "strict"))
    return parsed


@pytest.mark.parametrize("target", [
    "/v1/models/pump-risk%ED%A0%80",
    f"/v1/models/pump-risk/predictions?{QUERY}&explain=none%ED%A0%80",
    f"/v1/models/pump-risk/predictions?{QUERY}&x%ED%A0%80=1",
])
@pytest.mark.parametrize("token", [False, True], ids=["no-token", "token"])
def test_a_target_that_is_not_utf8_is_a_400_before_anything_else(
        base: str, target: str, token: bool) -> None:
    answer = ask(base, "GET", target, AUTH if token else {})
    body = strict(answer, 400)
    assert "UTF-8" in str(body["detail"])


@pytest.mark.parametrize("target", [
    "/v1/models/pump-risk\xed\xa0\x80",
    f"/v1/models/pump-risk/predictions?{QUERY}&pump_family=\xed\xa0\x80",
])
def test_raw_bytes_that_are_not_ascii_in_the_target_are_a_400(base: str, target: str) -> None:
    # A request target is ASCII (RFC 9112 section 3.2 by RFC 3986's grammar):
    # the server refuses the request line before the app sees it.
    strict(ask(base, "GET", target, AUTH), 400)


def test_a_lone_surrogate_in_a_json_body_is_a_422_naming_it(base: str) -> None:
    spec = {"name": "text-probe", "task": "binary", "target": "failed",
            "classes": ["ok", "\ud800"], "features": [{"name": "flow", "type": "numeric"}]}
    answer = post(base, "/v1/models", JSON, json.dumps(spec).encode())
    assert strict(answer, 422)["errors"] == {"classes.1": [NOT_SCALAR_TEXT]}
    row = {"features": {"vibration_rms": 1.0, "pump_family": "screw", "has_vfd": True,
                        "x\udfff": 1}, "label": "ok"}
    answer = post(base, "/v1/models/pump-risk/records", JSON,
                  json.dumps({"records": [row]}).encode())
    assert strict(answer, 422)["errors"] == {"records.0.features.x\\udfff": [NOT_SCALAR_TEXT]}


def test_a_csv_cell_that_is_not_utf8_is_a_400(base: str) -> None:
    data = (b"vibration_rms,pump_family,has_vfd,failed_within_30d\n"
            b"12.5,scr\xed\xa0\x80ew,true,ok\n")
    answer = post(base, "/v1/models/pump-risk/records", {**AUTH, "Content-Type": "text/csv"},
                  data)
    assert "not UTF-8" in str(strict(answer, 400)["detail"])
