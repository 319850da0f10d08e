"""``keelson forget MODEL --key K ... | --keys-file FILE [--reason R] [--retrain]``.

Forgets records and scored cases by key, through the use case the HTTP route
calls (service/usecases/forgetting.py) on the database directly, as
``keelson token`` does. A file with more keys than one request takes
(MAX_FORGET_KEYS) is sent in parts, each its own transaction (all or nothing
per part); the retrain, when asked for, is queued once, after the last part,
if anything was forgotten.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import click

from service.tools.model_commands import command_actor


def read_keys(path: Path) -> list[str]:
    """One key per line (UTF-8); blank lines are skipped, the line end is not
    part of the key."""
    with path.open(encoding="utf-8", newline="") as handle:
        return [line.rstrip("\r\n") for line in handle if line.rstrip("\r\n")]


@click.command("forget")
@click.argument("model")
@click.option("--key", "keys", multiple=True, metavar="KEY",
              help="A key to forget (repeat for several).")
@click.option("--keys-file", type=click.Path(exists=True, dir_okay=False, path_type=Path),
              default=None, help="A file of keys, one per line.")
@click.option("--reason", default=None, help="Why (kept in the model's history).")
@click.option("--retrain", is_flag=True,
              help="Then queue a retrain from scratch without them.")
@click.option("--json", "as_json", is_flag=True, help="The answers as JSON.")
def forget(model: str, keys: tuple[str, ...], keys_file: Path | None, reason: str | None,
           retrain: bool, as_json: bool) -> None:
    """Forget the records and scored cases (with their outcomes) of MODEL
    named by these keys. Every version trained on them is marked; the active
    one keeps serving until another version is promoted."""
    from marshmallow import ValidationError

    from service.config import load_config
    from service.store.database import open_database
    from service.usecases.forgetting import MAX_FORGET_KEYS, forget_records
    from service.usecases.jobs import request_retrain
    from service.web.schemas.forget import ForgetRequestSchema

    wanted = list(keys) + (read_keys(keys_file) if keys_file is not None else [])
    if not wanted:
        raise click.UsageError("Give the keys: --key KEY (repeatable) or --keys-file FILE.")
    db = open_database(load_config()["KEELSON_DATABASE_URL"])
    answers: list[dict[str, Any]] = []
    actor = command_actor()
    for start in range(0, len(wanted), MAX_FORGET_KEYS):
        part = wanted[start:start + MAX_FORGET_KEYS]
        body: dict[str, Any] = {"keys": part, **({} if reason is None else {"reason": reason})}
        try:
            checked = ForgetRequestSchema().load(body)
        except ValidationError as error:
            raise click.ClickException(f"keys {start + 1} to {start + len(part)}: "
                                       f"{json.dumps(error.messages)[:2000]}") from None
        answers.append(forget_records(db, model, checked["keys"], token=actor,
                                      reason=checked.get("reason"), retrain=False))
        if not as_json:
            _show(answers[-1], start, len(wanted))
    job = None
    if retrain and any(answer["forgotten"] for answer in answers):
        job = request_retrain(db, model, warm_start=False, token=actor, reason=reason)
        if not as_json:
            click.echo(f"retrain job {job['id']} queued: it trains a version from scratch "
                       "without them; that version serves once it is promoted")
    elif retrain and not as_json:
        click.echo("nothing was forgotten: no retrain queued")
    if as_json:
        click.echo(json.dumps({"answers": answers, "retrain": job}, indent=2, default=str))


def _show(answer: dict[str, Any], start: int, total: int) -> None:
    removed = answer["removed"]
    where = f" (keys {start + 1} to {start + answer['keys']} of {total})" if total > \
        answer["keys"] else ""
    click.echo(f"model {answer['model']}{where}: {answer['forgotten']} forgotten, "
               f"{answer['absent']} absent; removed {removed['records']} records "
               f"({removed['train']} train, {removed['holdout']} holdout), {removed['cases']} "
               f"scored cases ({removed['outcomes']} with an outcome); "
               f"{answer['versions_marked_count']} versions marked")
    click.echo(answer["message"])
