"""`keelson db upgrade` and `keelson token create|list|revoke` against real databases.

Our own contract (docs/http-api.md, "Auth and scopes": tokens are stored only
as hashes and printed once).
The hash check uses SHA-256 from Python's hashlib (FIPS 180-4).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

from click.testing import CliRunner
from sqlalchemy import create_engine, inspect, text

from service.tools.cli import cli
from service.web.app import create_app


def _run(database_url: str, *args: str) -> tuple[int, str, str]:
    result = CliRunner().invoke(cli, list(args), env={"KEELSON_DATABASE_URL": database_url},
                                prog_name="keelson")
    return result.exit_code, result.stdout, result.stderr


def test_db_upgrade_builds_the_schema_in_a_new_sqlite_file(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path}/sub/new.db"
    status, out, _ = _run(url, "db", "upgrade")
    assert status == 0, out
    engine = create_engine(url)
    try:
        tables = set(inspect(engine).get_table_names())
    finally:
        engine.dispose()
    assert {"models", "records", "versions", "jobs", "tokens", "alembic_version"} <= tables
    assert _run(url, "db", "upgrade")[0] == 0  # idempotent


def test_db_upgrade_on_an_unreachable_server_fails_with_one_clear_line() -> None:
    status, out, err = _run("postgresql+psycopg://nobody@127.0.0.1:1/none", "db", "upgrade")
    assert status == 1
    assert "Error: cannot use the database (postgresql+psycopg://nobody@127.0.0.1:1/none)" \
        in err
    assert "Traceback" not in out + err


def test_a_database_without_the_schema_gets_a_hint_to_upgrade(tmp_path: Path) -> None:
    status, _, err = _run(f"sqlite:///{tmp_path}/empty.db", "token", "list")
    assert status == 1
    assert "no such table: tokens; is the schema there? run `keelson db upgrade`" in err


def test_a_created_token_is_printed_once_stored_as_a_hash_and_works(database_url: str) -> None:
    status, out, err = _run(database_url, "token", "create", "--name", "scada-bridge",
                            "--scope", "ingest", "--scope", "predict")
    assert status == 0, err
    plaintext = out.strip()
    assert len(plaintext) >= 40 and "\n" not in plaintext
    assert "cannot be shown again" in err
    engine = create_engine(database_url)
    try:
        with engine.connect() as connection:
            stored = connection.execute(text("SELECT name, token_hash FROM tokens")).all()
    finally:
        engine.dispose()
    assert stored == [("scada-bridge", hashlib.sha256(plaintext.encode()).hexdigest())]
    client = create_app({"KEELSON_DATABASE_URL": database_url}).test_client()
    headers = {"Authorization": f"Bearer {plaintext}"}
    assert client.get("/v1/models", headers=headers).status_code == 200
    assert client.post("/v1/models", json={}, headers=headers).status_code == 403  # not admin


def test_tokens_are_listed_without_secrets_and_revoked_by_name(database_url: str) -> None:
    _, first, _ = _run(database_url, "token", "create", "--name", "a", "--scope", "admin")
    _run(database_url, "token", "create", "--name", "b", "--scope", "predict")
    status, out, _ = _run(database_url, "token", "list", "--json")
    assert status == 0
    listed = json.loads(out)["tokens"]
    assert [(t["name"], t["scopes"], t["revoked_at"]) for t in listed] == [
        ("a", ["admin"], None), ("b", ["predict"], None)]
    assert first.strip() not in out
    status, out, _ = _run(database_url, "token", "revoke", "a")
    assert status == 0 and "revoked" in out
    client = create_app({"KEELSON_DATABASE_URL": database_url,
                         "KEELSON_TOKEN_CACHE_SECONDS": 0.001}).test_client()
    answer = client.get("/v1/models", headers={"Authorization": f"Bearer {first.strip()}"})
    assert answer.status_code == 401
    status, _, err = _run(database_url, "token", "revoke", "a")  # nothing live by that name
    assert status == 1 and "No live token matches 'a'" in err
    status, out, _ = _run(database_url, "token", "list")
    assert "revoked" in out and "active" in out


def test_upgrades_started_together_on_postgresql_take_turns(postgres_url: str) -> None:
    """Several API hosts starting at once all upgrade first; none may fail."""
    import subprocess
    import sys
    import uuid

    from sqlalchemy.engine import make_url

    name = f"keelson_up_{uuid.uuid4().hex[:10]}"
    admin = create_engine(make_url(postgres_url).set(database="postgres"),
                          isolation_level="AUTOCOMMIT")
    with admin.connect() as connection:
        connection.execute(text(f'CREATE DATABASE "{name}"'))
    empty = make_url(postgres_url).set(database=name).render_as_string(hide_password=False)
    try:
        env = {"PATH": "/usr/bin:/bin", "KEELSON_DATABASE_URL": empty}
        runs = [subprocess.Popen([sys.executable, "-m", "service", "db", "upgrade"],
                                 env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                                 text=True) for _ in range(4)]
        outputs = [run.communicate(timeout=120)[0] for run in runs]
        assert [run.returncode for run in runs] == [0] * 4, outputs
        engine = create_engine(empty)
        try:
            with engine.connect() as connection:
                versions = connection.execute(text("SELECT version_num FROM alembic_version"))
                assert len(versions.all()) == 1
        finally:
            engine.dispose()
    finally:
        with admin.connect() as connection:
            connection.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


def test_a_token_limited_to_a_model_reaches_it_alone_and_is_listed_so(
        database_url: str) -> None:
    app = create_app({"KEELSON_DATABASE_URL": database_url, "KEELSON_ADMIN_TOKEN": "admin"})
    client = app.test_client()
    admin = {"Authorization": "Bearer admin"}
    for name in ("pump-risk", "booster-risk"):
        spec = {"name": name, "task": "regression", "target": "litres",
                "features": [{"name": "head_m", "type": "numeric"}]}
        assert client.post("/v1/models", json=spec, headers=admin).status_code == 201
    status, out, err = _run(database_url, "token", "create", "--name", "scada-bridge",
                            "--scope", "ingest", "--scope", "predict",
                            "--model", "pump-risk")
    assert status == 0, err
    assert "models: pump-risk" in err
    headers = {"Authorization": f"Bearer {out.strip()}"}
    assert client.get("/v1/models/pump-risk", headers=headers).status_code == 200
    assert client.get("/v1/models/booster-risk", headers=headers).status_code == 404
    listed = client.get("/v1/models", headers=headers).get_json()["models"]
    assert [m["name"] for m in listed] == ["pump-risk"]
    _run(database_url, "token", "create", "--name", "reader", "--scope", "predict")
    status, out, _ = _run(database_url, "token", "list", "--json")
    assert [(t["name"], t["models"]) for t in json.loads(out)["tokens"]] == [
        ("scada-bridge", ["pump-risk"]), ("reader", None)]
    status, out, _ = _run(database_url, "token", "list")
    lines = out.splitlines()
    assert "scada-bridge" in lines[0] and lines[0].endswith("models: pump-risk")
    assert "reader" in lines[1] and lines[1].endswith("models: all")
    # A mistyped model is refused, and no token is made.
    status, out, err = _run(database_url, "token", "create", "--name", "typo",
                            "--scope", "ingest", "--model", "pump-riks")
    assert status == 1 and "models: There is no model named 'pump-riks'." in err
    assert out == ""
    status, out, _ = _run(database_url, "token", "list", "--json")
    assert len(json.loads(out)["tokens"]) == 2
