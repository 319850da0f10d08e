"""`keelson forget` and `keelson model history|pause|resume|set`: the same
use cases as the HTTP routes, on the database directly; what they do shows
over HTTP. Common practice, no source."""

from __future__ import annotations

import json
from pathlib import Path

from click.testing import CliRunner
from sqlalchemy import select

from service.store.tables import RecordRow
from service.tools.cli import cli
from service.tools.forget_command import read_keys
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, add_version, create_model, ingest_raw, record


def run(database_url: str, *args: str) -> tuple[int, str, str]:
    result = CliRunner().invoke(cli, list(args), env={"KEELSON_DATABASE_URL": database_url},
                                prog_name="keelson")
    return result.exit_code, result.stdout, result.stderr


def keyed(api: ApiClient, n: int) -> list[tuple[int, str, str]]:
    create_model(api)
    ingest_raw(get_database(api.app).write, "pump-risk",
               [record(i, key=f"pump-{i}") for i in range(n)])
    with get_database(api.app).read() as session:
        return [(s, k, p) for s, k, p in session.execute(
            select(RecordRow.seq, RecordRow.key, RecordRow.split).order_by(RecordRow.seq))]


def test_forget_by_key_and_by_file_with_a_retrain(any_api: ApiClient, database_url: str,
                                                  tmp_path: Path) -> None:
    rows = keyed(any_api, 12)
    add_version(any_api.app, "pump-risk", 1, status="active", active=True, cursor=rows[-1][0])
    keys = tmp_path / "keys.txt"
    keys.write_text(f"{rows[1][1]}\r\n\n{rows[2][1]}\npump-never\n", encoding="utf-8")
    assert read_keys(keys) == [rows[1][1], rows[2][1], "pump-never"]
    status, out, err = run(database_url, "forget", "pump-risk", "--key", rows[0][1],
                           "--keys-file", str(keys), "--reason", "asked", "--retrain")
    assert status == 0, err
    assert "3 forgotten, 1 absent; removed 3 records" in out
    learned = sum(row[2] == "train" for row in rows[:3])
    if learned:
        assert (f"Version 1, active, was trained on {learned} of these records and keeps "
                "serving until another version is promoted.") in out
    assert "retrain job" in out and "queued" in out
    events = any_api.request("GET", "/v1/models/pump-risk/history", 200)["events"]
    forgotten = [e for e in events if e["kind"] == "records_forgotten"]
    assert len(forgotten) == 1 and forgotten[0]["reason"] == "asked"
    assert forgotten[0]["token"].startswith("keelson command (")
    assert events[-1]["kind"] == "retrain_requested"
    assert any_api.request("GET", "/v1/models/pump-risk", 200)["records"]["total"] == 9
    # Again: nothing to forget, no retrain queued, JSON when asked.
    status, out, err = run(database_url, "forget", "pump-risk", "--key", rows[0][1],
                           "--retrain", "--json")
    assert status == 0, err
    answer = json.loads(out)
    assert answer["retrain"] is None and answer["answers"][0]["absent"] == 1
    assert run(database_url, "forget", "pump-risk")[0] == 2  # no key: a usage error
    status, _, err = run(database_url, "forget", "no-such-model", "--key", "k")
    assert status == 1 and "There is no model named 'no-such-model'." in err


def test_model_pause_resume_set_and_history(any_api: ApiClient, database_url: str) -> None:
    create_model(any_api)
    status, out, err = run(database_url, "model", "pause", "pump-risk", "--reason", "shutdown")
    assert status == 0, err
    assert "online training paused since" in out
    assert any_api.request("GET", "/v1/models/pump-risk", 200)["trainer"]["paused"] is True
    status, out, err = run(database_url, "model", "resume", "pump-risk")
    assert status == 0 and "online training running" in out, err
    status, out, err = run(database_url, "model", "set", "pump-risk", "--promotion", "manual",
                           "--training", "learning_rate=0.002", "--reason", "noisy month")
    assert status == 0, err
    assert "training.learning_rate" in out and "0.002" in out and "promotion" in out
    model = any_api.request("GET", "/v1/models/pump-risk", 200)
    assert model["promotion"] == "manual" and model["training"]["learning_rate"] == 0.002
    # The API's rules and words: a new network is refused, nothing changes.
    status, _, err = run(database_url, "model", "set", "pump-risk", "--training",
                         "learning_rate=-1")
    assert status == 1 and "training.learning_rate" in err
    status, _, err = run(database_url, "model", "set", "pump-risk", "--training",
                         "optimizer=adam")
    assert status == 1 and "needs a new model" in err
    assert run(database_url, "model", "set", "pump-risk")[0] == 2
    status, out, err = run(database_url, "model", "history", "pump-risk", "--json")
    assert status == 0, err
    kinds = [(e["kind"], e["reason"]) for e in json.loads(out)["events"]]
    assert kinds == [("created", None), ("paused", "shutdown"), ("resumed", None),
                     ("settings_changed", "noisy month")]
    status, out, err = run(database_url, "model", "history", "pump-risk")
    assert status == 0 and "settings_changed" in out and "because: noisy month" in out
    status, _, err = run(database_url, "model", "history", "no-such-model")
    assert status == 1 and "There is no model named 'no-such-model'." in err


def test_model_delete_needs_the_name_twice(any_api: ApiClient, database_url: str) -> None:
    create_model(any_api)
    assert run(database_url, "model", "delete", "pump-risk", "--confirm", "pump")[0] == 2
    any_api.request("GET", "/v1/models/pump-risk", 200)
    status, out, err = run(database_url, "model", "delete", "pump-risk", "--confirm",
                           "pump-risk")
    assert status == 0 and "deleted; job" in out, err
    any_api.request("GET", "/v1/models/pump-risk", 404)
    again = run(database_url, "model", "delete", "pump-risk", "--confirm", "pump-risk")[1]
    assert again.split("job")[1] == out.split("job")[1]  # the same job
