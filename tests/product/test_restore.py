"""A version exported as Keelson's snapshot file (format=snapshot, or `keelson
export-version ... FILE.keelson`) and restored by `keelson restore FILE --as
NAME` into a fresh database answers identical predictions (issue 12, section
4). Our own contract (docs/snapshot-format.md); no outside source."""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from click.testing import CliRunner

from service.tools.bench.scratch import scratch_postgres
from service.tools.cli import cli
from service.web.extensions import get_database
from tests.service.conftest import build_app
from tests.service.helpers import ADMIN_TOKEN, ApiClient, create_model
from tests.service.predictions_factory import (
    add_version,
    pump_rows,
    pump_rule,
    stored_spec,
    train_learner,
)


@contextlib.contextmanager
def _fresh_database(source_url: str, tmp_path: Path) -> Iterator[str]:
    """An empty database of the same kind as ``source_url``."""
    if source_url.startswith("sqlite"):
        yield f"sqlite:///{tmp_path}/restored.db"
        return
    with scratch_postgres(os.environ["KEELSON_TEST_DATABASE_URL"]) as url:
        yield url


def _run(database_url: str, *args: str) -> tuple[int, str]:
    result = CliRunner().invoke(cli, list(args), env={"KEELSON_DATABASE_URL": database_url},
                                prog_name="keelson")
    return result.exit_code, result.output


def _predictions(api: ApiClient, name: str) -> Any:
    return api.request("POST", f"/v1/models/{name}/predictions", 200, json_body={
        "explain": "integrated_gradients",
        "records": [{"features": row} for row in pump_rows(50, seed=11)]})


def test_an_exported_snapshot_restores_into_a_fresh_database_with_identical_predictions(
        database_url: str, tmp_path: Path) -> None:
    source = build_app(database_url)
    api = ApiClient(source)
    create_model(api)
    rows = pump_rows(300, seed=4)
    learner = train_learner(stored_spec(source, "pump-risk"), rows, pump_rule)
    add_version(source, "pump-risk", learner.to_bytes(), records_seen=len(rows))
    path = tmp_path / "pump-risk-v1.keelson"
    status, output = _run(database_url, "export-version", "pump-risk", "1", str(path))
    assert status == 0, output
    over_http = api.client.get("/v1/models/pump-risk/versions/1/export?format=snapshot",
                               headers={"Authorization": f"Bearer {ADMIN_TOKEN}"})
    assert over_http.status_code == 200
    assert 'filename="pump-risk-v1.keelson"' in over_http.headers["Content-Disposition"]
    (tmp_path / "http.keelson").write_bytes(over_http.data)
    expected = _predictions(api, "pump-risk")
    get_database(source).engine.dispose()

    with _fresh_database(database_url, tmp_path) as target_url:
        assert _run(target_url, "db", "upgrade")[0] == 0
        status, output = _run(target_url, "restore", str(path), "--as", "lift-risk")
        assert status == 0, output
        assert "(version 1 of pump-risk) restored as model lift-risk, version 1 active" \
            in output
        status, output = _run(target_url, "restore", str(tmp_path / "http.keelson"),
                              "--as", "booster-risk")
        assert status == 0, output
        target = build_app(target_url)
        try:
            restored = ApiClient(target)
            model = restored.request("GET", "/v1/models/lift-risk", 200)
            assert model["active_version"] == 1
            for name in ("lift-risk", "booster-risk"):
                answer = _predictions(restored, name)
                assert answer == {**expected, "model": name}
            # A name taken, a file that is not a snapshot: refused, nothing made.
            status, output = _run(target_url, "restore", str(path), "--as", "lift-risk")
            assert status == 1 and "already exists" in output
            junk = tmp_path / "junk.keelson"
            junk.write_bytes(b"PK\x03\x04 not a snapshot")
            status, output = _run(target_url, "restore", str(junk), "--as", "sump-risk")
            assert status == 1 and "not a usable Keelson snapshot" in output
            restored.request("GET", "/v1/models/sump-risk", 404)
        finally:
            get_database(target).engine.dispose()


@pytest.mark.parametrize("query", ["format=pickle", "format=snapshot&extra=1"])
def test_a_bad_export_query_is_refused(database_url: str, query: str) -> None:
    api = ApiClient(build_app(database_url))
    create_model(api)
    api.request("GET", f"/v1/models/pump-risk/versions/1/export?{query}", 422)
    api.request("GET", "/v1/models/pump-risk/versions/9/export?format=snapshot", 404)
    get_database(api.app).engine.dispose()
