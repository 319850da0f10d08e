"""`keelson export MODEL FILE`: every record into a file with a progress bar,
and a CSV export that reads back through `keelson import` into a new model
as the same records (issue 12, section 5). Our own contract; no outside
source. The data are invented pump-weeks, generated here."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
from click.testing import CliRunner

from service.store.database import make_engine, make_sessionmaker
from service.store.record_dump import RecordFilter
from service.tools.cli import cli
from service.usecases.record_export import open_export
from service.web.app import create_app

ADMIN = "test-admin-token"


def _spec(name: str) -> dict[str, Any]:
    return {"name": name, "task": "regression", "target": "flow_m3h",
            "features": [
                {"name": "vibration_rms", "type": "numeric", "min": 0, "max": 100},
                {"name": "pump_family", "type": "categorical",
                 "levels": ["centrifugal", "screw", "lobe, rotary"]},
                {"name": "has_vfd", "type": "boolean"}]}


def _setup(database_url: str, count: int) -> None:
    client = create_app({"KEELSON_DATABASE_URL": database_url,
                         "KEELSON_ADMIN_TOKEN": ADMIN}).test_client()
    auth = {"Authorization": f"Bearer {ADMIN}"}
    for name in ("pump-flow", "pump-flow-copy"):
        assert client.post("/v1/models", json=_spec(name), headers=auth).status_code == 201
    rng = np.random.default_rng(5)
    levels = ["centrifugal", "screw", "lobe, rotary"]
    records = [{"features": {"vibration_rms": float(rng.uniform(0, 100)),
                             "pump_family": levels[i % 3], "has_vfd": bool(i % 2)},
                "label": float(rng.normal(0, 1) * 10.0 ** rng.integers(-8, 8))}
               for i in range(count)]
    for i, row in enumerate(records):
        if i % 7:  # some records carry no key
            # a quote, a backslash, a newline: cells the CSV must quote and escape
            row["key"] = f"station-{i % 13}/week-{i}" if i % 11 else f'lift "{i}"\\\n{i}'

    answer = client.post("/v1/models/pump-flow/records", json={"records": records},
                         headers=auth)
    assert answer.status_code == 201, answer.get_json()


def _records(database_url: str, model: str) -> list[dict[str, Any]]:
    engine = make_engine(database_url)
    try:
        export = open_export(make_sessionmaker(engine), model, "ndjson", RecordFilter())
        return [json.loads(line) for data in export.chunks() for line in data.splitlines()]
    finally:
        engine.dispose()


def _run(database_url: str, *args: str) -> tuple[int, str]:
    result = CliRunner().invoke(cli, list(args), env={"KEELSON_DATABASE_URL": database_url},
                                prog_name="keelson")
    return result.exit_code, result.output


def test_a_csv_export_imports_into_a_new_model_as_the_same_records(
        database_url: str, tmp_path: Path) -> None:
    _setup(database_url, 500)
    path = tmp_path / "pump-flow.csv"
    status, output = _run(database_url, "export", "pump-flow", str(path))
    assert status == 0, output
    assert "Exporting pump-flow" in output  # the progress bar (stderr, mixed in)
    assert f"pump-flow -> {path}: 500 records" in output
    status, output = _run(database_url, "import", "pump-flow-copy", str(path))
    assert status == 0, output
    assert "500 stored, 0 duplicates, 0 not stored" in output
    original, copy = _records(database_url, "pump-flow"), _records(database_url, "pump-flow-copy")

    def same(rows: list[dict[str, Any]]) -> list[tuple[Any, ...]]:
        return [(r["key"], r["fields"], r["label"]) for r in rows]

    assert same(copy) == same(original)  # floats compared exactly: bit for bit


def test_ndjson_by_extension_is_the_http_answer(database_url: str, tmp_path: Path) -> None:
    _setup(database_url, 30)
    path = tmp_path / "pump-flow.ndjson"
    status, output = _run(database_url, "export", "pump-flow", str(path))
    assert status == 0, output
    assert [json.loads(line) for line in path.read_text().splitlines()] == \
        _records(database_url, "pump-flow")
    assert not list(tmp_path.glob("*.partial"))


def test_an_unknown_model_is_one_line_and_no_file(database_url: str, tmp_path: Path) -> None:
    _setup(database_url, 1)
    out = tmp_path / "out"
    out.mkdir()
    status, output = _run(database_url, "export", "lift-flow", str(out / "x.csv"))
    assert status == 1
    assert "lift-flow" in output
    assert list(out.iterdir()) == []
