"""Security: tokens, hostile input, planted snapshots, headers.

Already held elsewhere and not repeated here: the auth matrix over the app's
URL map (tests/service/test_auth.py: every route needs its declared scope, a
route declaring none is refused), the stored token row being a SHA-256
(same file), the ingest bad-input catalogue with its 413s
(tests/service/test_ingest_bad_input.py), a whole-pickle and a truncated
snapshot over HTTP (tests/service/test_predictions_api.py) and object arrays
inside an npz at the engine level (tests/engine/test_snapshot.py).

Added here: the plaintext of a token made with ``keelson token create``
appears nowhere in the database file, the comparison is constant-time in the
code, tokens never reach the server's logs (debug level, access log on), size
and nesting limits on every JSON route, SQL and path injection attempts, a
pickled object array planted *inside* an otherwise valid snapshot in the
database (over HTTP and in the worker), no CORS headers, and the security
headers on every kind of answer.
"""

from __future__ import annotations

import ast
import inspect
import io
import json
import re
import textwrap
import zipfile
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from click.testing import CliRunner
from flask import Flask
from sqlalchemy import func, select

from service.store.tables import ModelRow, RecordRow, TrainerRow, VersionRow
from service.tools.cli import cli as keelson
from service.web import auth
from service.web.app import SECURITY_HEADERS
from service.web.extensions import get_database
from tests.reliability.harness import ADMIN, Client, api_server
from tests.service.conftest import build_app
from tests.service.helpers import ADMIN_TOKEN, ApiClient, create_model, record
from tests.service.predictions_factory import add_version, pump_rows, pump_rule, train_learner

PUMP_QUERY = "vibration_rms=12.5&pump_family=screw&has_vfd=true"


def counts(app: Flask) -> tuple[int, int, int]:
    with get_database(app).read() as session:
        return (session.scalar(select(func.count()).select_from(ModelRow)) or 0,
                session.scalar(select(func.count()).select_from(RecordRow)) or 0,
                session.scalar(select(func.count()).select_from(VersionRow)) or 0)


# --- tokens -----------------------------------------------------------------

def test_a_created_token_is_nowhere_in_the_database_file(sqlite_url: str) -> None:
    result = CliRunner().invoke(keelson, ["token", "create", "--name", "scada-bridge",
                                          "--scope", "ingest"],
                                env={"KEELSON_DATABASE_URL": sqlite_url})
    assert result.exit_code == 0, result.output
    plaintext = max(re.findall(r"[A-Za-z0-9_-]{40,}", result.output), key=len)
    app = build_app(sqlite_url)
    ApiClient(app).request("POST", "/v1/models/pump-risk/records", 404, token=plaintext,
                           json_body={"records": [record(1)]})  # the token works
    get_database(app).engine.dispose()
    path = Path(sqlite_url.removeprefix("sqlite:///"))
    stored = b"".join(p.read_bytes() for p in path.parent.glob(path.name + "*"))
    assert plaintext.encode() not in stored
    assert auth.hash_token(plaintext).encode() in stored  # what is kept instead


def test_token_checks_compare_in_constant_time() -> None:
    """Code-level: secrets are compared with hmac.compare_digest (Python docs:
    "reduce the vulnerability to timing attacks"), never with == or !=."""
    # grant_for_token hashes and asks grant_for_digest, where the compares are.
    source = textwrap.dedent(inspect.getsource(auth.grant_for_digest))
    tree = ast.parse(source)
    calls = [ast.unparse(node.func) for node in ast.walk(tree) if isinstance(node, ast.Call)]
    assert calls.count("hmac.compare_digest") >= 2  # the admin token and a stored one
    for node in ast.walk(tree):
        if isinstance(node, ast.Compare) and any(isinstance(op, ast.Eq | ast.NotEq)
                                                 for op in node.ops):
            text = ast.unparse(node)
            # An SQL equality (a hash lookup in the database) is not a secret compare.
            assert "TokenRow.token_hash ==" in text, text


@pytest.mark.slow
def test_tokens_never_reach_the_server_logs(sqlite_url: str, tmp_path: Path) -> None:
    with api_server(sqlite_url, tmp_path, workers=1, KEELSON_LOG_LEVEL="debug",
                    KEELSON_ACCESS_LOG="1") as (base, _server):
        admin = Client(base)
        assert admin.request("POST", "/v1/models", {
            "name": "pump-risk", "task": "binary", "target": "y",
            "features": [{"name": "x", "type": "numeric"}]})[0] == 201
        unknown = "unknown-token-" + "q" * 30
        for token in (ADMIN, unknown):
            client = Client(base, token=token)
            for method, path, body in [
                ("GET", "/v1/models", None), ("GET", "/v1/models/pump-risk", None),
                ("POST", "/v1/models/pump-risk/records", {"records": [{"features": {"x": 1},
                                                                        "label": True}]}),
                ("POST", "/v1/models/pump-risk/records", {"records": [{"bad": 1}]}),
                ("GET", "/v1/models/pump-risk/predictions?x=1", None),
                # RFC 6750 section 2.3 spelling; not accepted, and not logged either,
                # whatever the spelling of the name.
                ("GET", f"/v1/models?access_token={token}", None),
                *[("GET", f"/v1/models?x=1&{name}={token}", None) for name in (
                    "access%5Ftoken", "access%255Ftoken", "api_key", "Api-Key", "key",
                    "token", "auth", "bearer", "authorization")],
                ("GET", f"/v1/models/pump-risk/predictions?x=1;token={token}", None),
                ("GET", "/nowhere", None),
            ]:
                assert client.request(method, path, body)[0] < 500
            client.close()
        admin.close()
    log = (tmp_path / "api.log").read_text()
    assert '"GET' in log or "GET " in log  # the access log was on
    for token in (ADMIN, unknown):
        assert token not in log
        assert auth.hash_token(token) not in log


# --- limits and injection ---------------------------------------------------

JSON_ROUTES = ["/v1/models", "/v1/models/pump-risk/records",
               "/v1/models/pump-risk/predictions", "/v1/models/pump-risk/retrain"]


@pytest.mark.parametrize("path", JSON_ROUTES)
def test_size_and_nesting_limits_on_every_json_route(sqlite_url: str, path: str) -> None:
    app = build_app(sqlite_url, KEELSON_MAX_BODY_BYTES=4096)
    api = ApiClient(app)
    create_model(api)
    before = counts(app)
    deep = '{"records": ' + "[" * 100 + "]" * 100 + "}"
    body = api.request("POST", path, 400, data=deep, content_type="application/json")
    assert body["status"] == 400
    huge = json.dumps({"records": [record(i) for i in range(200)]})
    assert len(huge) > 4096
    api.request("POST", path, 413, data=huge, content_type="application/json")
    assert counts(app) == before


NAMES = ["x'; DROP TABLE records; --", "pump-risk' OR '1'='1", "../../etc/passwd",
         "%2e%2e%2fmodels", "pump-risk%00", "pump-risk/../pump-risk", "PUMP-RISK",
         "pump-risk;SELECT 1", "\u202epump", "a" * 300]


@pytest.mark.parametrize("name", NAMES)
def test_injection_in_model_names_has_no_effect(api: ApiClient, name: str) -> None:
    create_model(api)
    api.request("POST", "/v1/models/pump-risk/records", 201, json_body={
        "records": [record(i, key=f"k{i}") for i in range(5)]})
    before = counts(api.app)
    body = api.request("POST", "/v1/models", 422, json_body={
        "name": name, "task": "binary", "target": "y",
        "features": [{"name": "x", "type": "numeric"}]})
    assert "name" in body["errors"]
    for method, suffix in [("GET", ""), ("GET", "/versions"), ("GET", "/predictions?x=1"),
                           ("POST", "/records"), ("POST", "/retrain")]:
        response = api.client.open(f"/v1/models/{name}{suffix}", method=method,
                                   json={"records": [record(1)]} if method == "POST" else None,
                                   headers={"Authorization": f"Bearer {ADMIN_TOKEN}"})
        assert response.status_code in (400, 404, 405, 422), (name, suffix, response.data)
        assert response.mimetype == "application/problem+json"
    assert counts(api.app) == before
    assert api.request("GET", "/v1/models", 200)["models"][0]["name"] == "pump-risk"


def test_injection_in_keys_and_query_strings_is_data_not_code(api: ApiClient) -> None:
    create_model(api)
    hostile = ["'); DROP TABLE records; --", "k' OR '1'='1", "../../../etc/passwd",
               "%00", "\\x00", "$(touch /tmp/x)", "{{7*7}}", "k\u202ez"]
    body = api.request("POST", "/v1/models/pump-risk/records", 201, json_body={
        "records": [record(i, key=key) for i, key in enumerate(hostile)]})
    assert body == {"accepted": len(hostile), "duplicates": 0}
    with get_database(api.app).read() as session:
        stored = set(session.scalars(select(RecordRow.key)))
    assert stored == set(hostile)  # stored verbatim, nothing else happened
    body = api.request("POST", "/v1/models/pump-risk/records", 201, json_body={
        "records": [record(i, key=key) for i, key in enumerate(hostile)]})
    assert body == {"accepted": 0, "duplicates": len(hostile)}
    for query in ["vibration_rms=1' OR '1'='1&pump_family=screw&has_vfd=true",
                  "vibration_rms=1&pump_family=screw'; DROP TABLE models; --&has_vfd=true",
                  "vibration_rms=1&pump_family=screw&has_vfd=true&version=1 OR 1=1",
                  "vibration_rms=1&pump_family=screw&has_vfd=true&x'%3B--=1",
                  "vibration_rms=1&pump_family=..%2F..%2Fetc&has_vfd=true"]:
        response = api.client.get(f"/v1/models/pump-risk/predictions?{query}",
                                  headers={"Authorization": f"Bearer {ADMIN_TOKEN}"})
        assert response.status_code == 422, (query, response.data)
        assert response.get_json()["errors"]
    assert counts(api.app) == (1, len(hostile), 0)


def nul_key_refused(api: ApiClient) -> None:
    create_model(api)
    for body, content_type in [
        (json.dumps({"records": [record(1, key="ok"), record(2, key="k\u0000")]}),
         "application/json"),
        ("key,vibration_rms,pump_family,has_vfd,failed_within_30d\nk\u0000,1,screw,true,ok\n",
         "text/csv"),
    ]:
        answer = api.request("POST", "/v1/models/pump-risk/records", 422, data=body,
                             content_type=content_type)
        assert any(path.endswith(".key") for path in answer["errors"]), answer
    assert counts(api.app)[1] == 0


def test_a_nul_in_a_key_is_refused_on_both_backends(database_url: str) -> None:
    """PostgreSQL text cannot hold U+0000 (PostgreSQL docs, "Character Types");
    it was a 500 there. Refused with the record's path on every backend."""
    app = build_app(database_url)
    try:
        nul_key_refused(ApiClient(app))
    finally:
        get_database(app).engine.dispose()


def test_numbers_beyond_the_columns_are_4xx_on_both_backends(database_url: str) -> None:
    """Job ids and version numbers are 32-bit columns; a larger one in a path or
    the version option was a 500 on PostgreSQL (and beyond 64 bits on SQLite)."""
    app = build_app(database_url)
    try:
        api = ApiClient(app)
        create_model(api)
        for big in (2**31, 2**63, 10**30):
            api.request("GET", f"/v1/jobs/{big}", 404)
            api.request("GET", f"/v1/models/pump-risk/versions/{big}", 404)
            api.request("POST", f"/v1/models/pump-risk/versions/{big}/promote", 404)
            body = api.request("GET", f"/v1/models/pump-risk/predictions?{PUMP_QUERY}"
                               f"&version={big}", 422)
            assert "version" in body["errors"]
            body = api.request("POST", "/v1/models/pump-risk/predictions", 422, json_body={
                "records": [{"features": {"vibration_rms": 1.0, "pump_family": "screw",
                                          "has_vfd": True}}], "version": big})
            assert "version" in body["errors"]
        api.request("GET", f"/v1/jobs/{2**31 - 1}", 404)  # the largest is a plain miss
    finally:
        get_database(app).engine.dispose()


# --- planted snapshots ------------------------------------------------------

def planted_snapshot(valid: bytes, marker: Path) -> bytes:
    """``valid`` with one more member: an object array whose unpickling would
    create ``marker``. np.load(allow_pickle=False) must refuse it (numpy docs)."""

    class Payload:
        def __reduce__(self) -> tuple[Any, ...]:
            return (Path.touch, (marker,))

    source = zipfile.ZipFile(io.BytesIO(valid))
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as target:
        for item in source.infolist():
            target.writestr(item, source.read(item.filename))
        member = io.BytesIO()
        np.save(member, np.array([Payload()], dtype=object), allow_pickle=True)
        target.writestr("params.npy" if "params.npy" not in source.namelist()
                        else "zz_planted.npy", member.getvalue())
    return out.getvalue()


def flipped(valid: bytes) -> bytes:
    data = bytearray(valid)
    middle = len(data) // 2
    data[middle:middle + 16] = bytes(b ^ 0xFF for b in data[middle:middle + 16])
    return bytes(data)


@pytest.mark.parametrize("tamper", ["planted-object-array", "bytes-flipped", "truncated"])
def test_a_tampered_snapshot_is_a_clear_error_over_http(api: ApiClient, tmp_path: Path,
                                                        tamper: str) -> None:
    created = create_model(api)
    learner = train_learner(created, pump_rows(64), pump_rule, passes=1)
    good = learner.to_bytes()
    marker = tmp_path / "executed"
    bad = {"planted-object-array": planted_snapshot(good, marker),
           "bytes-flipped": flipped(good), "truncated": good[: len(good) // 3]}[tamper]
    add_version(api.app, "pump-risk", good, activate=False)
    add_version(api.app, "pump-risk", bad, activate=True)
    body = api.request("GET", f"/v1/models/pump-risk/predictions?{PUMP_QUERY}", 503)
    assert "cannot be loaded" in body["detail"]
    api.request("GET", f"/v1/models/pump-risk/predictions?{PUMP_QUERY}&version=1", 200)
    api.request("POST", "/v1/models/pump-risk/predictions?version=2", 503,
                json_body={"records": [{"features": {"vibration_rms": 1.0,
                                                     "pump_family": "screw",
                                                     "has_vfd": False}}]})
    assert not marker.exists()


def test_a_planted_snapshot_backs_the_worker_off_that_model_without_running(
    sqlite_url: str, tmp_path: Path
) -> None:
    from tests.worker.helpers import database, trainer, wait_until, worker_thread

    app = build_app(sqlite_url)
    api = ApiClient(app)
    created = create_model(api)
    marker = tmp_path / "executed"
    good = train_learner(created, pump_rows(64), pump_rule, passes=1).to_bytes()
    add_version(app, "pump-risk", planted_snapshot(good, marker), activate=True)
    with get_database(app).write() as session:
        model_id = session.scalars(select(ModelRow.id)).one()
        version_id = session.scalars(select(VersionRow.id)).one()
        row = session.get(TrainerRow, model_id)
        if row is None:
            session.add(TrainerRow(model_id=model_id, cursor=0, head_version_id=version_id))
        else:
            row.head_version_id = version_id
        session.commit()
    api.request("POST", "/v1/models/pump-risk/records", 201,
                json_body={"records": [record(i) for i in range(20)]})
    db = database(sqlite_url)
    with worker_thread(sqlite_url):
        fault = wait_until(lambda: trainer(db, model_id).fault, timeout=120)
    assert "cannot be loaded" in fault and trainer(db, model_id).retry_at is not None
    assert not marker.exists()
    db.engine.dispose()


# --- headers ----------------------------------------------------------------

def test_security_headers_on_every_kind_of_answer_and_no_cors(sqlite_url: str) -> None:
    app = build_app(sqlite_url, TESTING=False, KEELSON_MAX_BODY_BYTES=1024)
    api = ApiClient(app)
    create_model(api)
    origin = {"Origin": "https://elsewhere.example"}
    admin = {"Authorization": f"Bearer {ADMIN_TOKEN}", **origin}
    cases = [
        ("GET", "/healthz", {}, None, 200), ("GET", "/readyz", {}, None, 200),
        ("GET", "/openapi.json", {}, None, 200), ("GET", "/metrics", {}, None, 200),
        ("GET", "/v1/models", admin, None, 200), ("GET", "/v1/models", origin, None, 401),
        ("GET", "/v1/models/none", admin, None, 404), ("DELETE", "/v1/models", admin, None, 405),
        ("POST", "/v1/models", admin, "{", 400), ("POST", "/v1/models", admin, "x" * 2048, 413),
        ("POST", "/v1/models", admin, "{}", 422),
        ("GET", f"/v1/models/pump-risk/predictions?{PUMP_QUERY}", admin, None, 409),
        # A preflight carries no token: refused like any other request.
        ("OPTIONS", "/v1/models", {**origin, "Access-Control-Request-Method": "POST"}, None,
         401),
    ]
    for method, path, headers, data, status in cases:
        response = api.client.open(path, method=method, headers=headers, data=data,
                                   content_type="application/json" if data else None)
        assert response.status_code == status, (method, path, response.status_code)
        for name, value in SECURITY_HEADERS.items():
            assert response.headers.get(name) == value, (method, path, name)
        assert not [h for h, _ in response.headers.items() if h.lower().startswith(
            "access-control-")], (method, path, dict(response.headers))
