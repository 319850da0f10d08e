"""``keelson model history|pause|resume|set|delete``: a model's history and
the admin acts on it, from the command line.

Like ``keelson token`` these work on the database directly (the
``KEELSON_DATABASE_URL`` the service uses), through the same use cases the
HTTP routes call (service/usecases/history.py, settings.py, deletion.py): the same rules,
the same one transaction per act, the same event in the model's history.
Settings go through the body schema of ``PATCH /v1/models/{name}``, so a
value the API refuses is refused here with the same words.
"""

from __future__ import annotations

import getpass
import json
from typing import Any

import click


def command_actor() -> str:
    """Who acted, as the history shows it: there is no token on the command
    line, so the operating-system user who ran the command."""
    try:
        user = getpass.getuser()
    except (KeyError, OSError):  # no name for this uid (a bare container)
        user = "unknown user"
    return f"keelson command ({user})"[:100]


def _database() -> Any:
    from service.config import load_config
    from service.store.database import open_database

    return open_database(load_config()["KEELSON_DATABASE_URL"])


def _json(value: Any) -> str:
    return json.dumps(value, indent=2, default=str)


@click.group("model")
def model() -> None:
    """A model's history; pausing, resuming, changing and deleting it."""


@model.command("history")
@click.argument("name")
@click.option("--json", "as_json", is_flag=True, help="One JSON object instead of lines.")
def history_command(name: str, as_json: bool) -> None:
    """Everything that happened to model NAME, oldest first: who (token name)
    and why (reason) for each admin act."""
    from service.usecases.history import list_history

    db, events, after = _database(), [], None
    while True:  # every page: a history is short beside the records
        page, after = list_history(db, name, limit=1000, after=after)
        events.extend(page)
        if after is None:
            break
    if as_json:
        click.echo(_json({"model": name, "events": events}))
        return
    for event in events:
        who = event["token"] or "worker"
        why = f"  because: {event['reason']}" if event["reason"] else ""
        click.echo(f"{event['id']:>6}  {event['at']:%Y-%m-%d %H:%M:%S}  {event['kind']:<18} "
                   f"by {who}  at record {event['at_seq']}{why}")
        click.echo(f"        {_details_line(event['details'])}")


def _details_line(details: dict[str, Any]) -> str:
    shown = {key: value for key, value in details.items() if key != "keys_sha256"}
    if "keys_sha256" in details:
        shown["keys_sha256"] = f"{len(details['keys_sha256'])} hashes (see --json)"
    return json.dumps(shown, default=str)


@model.command("pause")
@click.argument("name")
@click.option("--reason", default=None, help="Why (kept in the model's history).")
def pause_command(name: str, reason: str | None) -> None:
    """Stop model NAME's online training: records are still stored (lag
    grows) and predictions served. Pausing a paused model changes nothing."""
    _set_paused(name, True, reason)


@model.command("resume")
@click.argument("name")
@click.option("--reason", default=None, help="Why (kept in the model's history).")
def resume_command(name: str, reason: str | None) -> None:
    """Train model NAME again from where its trainer stopped."""
    _set_paused(name, False, reason)


def _set_paused(name: str, paused: bool, reason: str | None) -> None:
    from service.usecases.history import set_paused

    body = _checked({"reason": reason} if reason is not None else {})
    state = set_paused(_database(), name, paused, token=command_actor(),
                       reason=body.get("reason"))
    since = f" since {state['paused_at']:%Y-%m-%d %H:%M:%S} UTC" if state["paused"] else ""
    click.echo(f"model {name}: online training {'paused' if state['paused'] else 'running'}"
               f"{since}")


@model.command("set")
@click.argument("name")
@click.option("--promotion", type=click.Choice(["auto", "manual"]), default=None,
              help="How versions become active.")
@click.option("--training", "training", multiple=True, metavar="OPTION=VALUE",
              help="A training option, e.g. learning_rate=0.002 or checkpoint_every=500 "
                   "(repeat for several; docs/http-api.md lists them).")
@click.option("--alarm", "alarm", multiple=True, metavar="OPTION=VALUE",
              help="A change-alarm parameter, e.g. threshold=80 (repeat for several).")
@click.option("--reason", default=None, help="Why (kept in the model's history).")
def set_command(name: str, promotion: str | None, training: tuple[str, ...],
                alarm: tuple[str, ...], reason: str | None) -> None:
    """Change model NAME's settings that keep its network and fields (as
    PATCH /v1/models/NAME does). They apply from the record after its last one."""
    from service.config import load_config
    from service.usecases.model_limits import ModelLimits
    from service.usecases.settings import change_settings

    raw: dict[str, Any] = {}
    if promotion is not None:
        raw["promotion"] = promotion
    if training:
        raw["training"] = _options(training, "--training")
    if alarm:
        raw["alarm"] = _options(alarm, "--alarm")
    if reason is not None:
        raw["reason"] = reason
    if not raw.keys() - {"reason"}:
        raise click.UsageError("Nothing to change: give --promotion, --training or --alarm.")
    changes = _checked(raw)
    reason = changes.pop("reason", None)
    changed = change_settings(_database(), name, changes, ModelLimits.from_config(load_config()),
                              token=command_actor(), reason=reason)
    if not changed:
        click.echo(f"model {name}: nothing changed (the settings were already so)")
    for path, change in changed.items():
        click.echo(f"model {name}: {path} {json.dumps(change['from'])} -> "
                   f"{json.dumps(change['to'])}")


def _options(pairs: tuple[str, ...], option: str) -> dict[str, Any]:
    """``KEY=VALUE`` pairs; a value is read as JSON (0.002, true, null), else text."""
    options: dict[str, Any] = {}
    for pair in pairs:
        key, sep, text = pair.partition("=")
        if not sep or not key:
            raise click.BadParameter(f"{pair!r} is not OPTION=VALUE", param_hint=option)
        try:
            options[key] = json.loads(text)
        except ValueError:
            options[key] = text
    return options


def _checked(body: dict[str, Any]) -> dict[str, Any]:
    """The body through the PATCH schema: the API's rules and words."""
    from marshmallow import ValidationError

    from service.web.schemas.settings import ModelPatchSchema

    try:
        loaded: dict[str, Any] = ModelPatchSchema().load(body)
    except ValidationError as error:
        lines = [f"  {path}: {messages}" for path, messages in _flat(error.messages)]
        raise click.ClickException("\n".join(["The settings are invalid.", *lines])) from None
    return loaded


def _flat(messages: Any, prefix: str = "") -> list[tuple[str, str]]:
    if isinstance(messages, dict):
        found: list[tuple[str, str]] = []
        for key, inner in messages.items():
            found.extend(_flat(inner, f"{prefix}.{key}" if prefix else str(key)))
        return found
    if isinstance(messages, list) and all(isinstance(m, str) for m in messages):
        return [(prefix or "body", "; ".join(messages))]
    return [(prefix or "body", str(messages))]


@model.command("delete")
@click.argument("name")
@click.option("--confirm", required=True, metavar="NAME",
              help="The model's name again: a slip of the keyboard deletes nothing.")
def delete_command(name: str, confirm: str) -> None:
    """Delete model NAME with its records, cases, versions and jobs (as
    DELETE /v1/models/NAME?confirm=NAME): gone at once, a worker removes the
    rows. Asking again shows the same job."""
    from service.usecases.deletion import request_delete

    if confirm != name:
        raise click.UsageError(f"--confirm must repeat the model's name ({name!r}).")
    job = request_delete(_database(), name)
    click.echo(f"model {name}: deleted; job {job['id']} ({job['status']}) removes its rows "
               f"(see GET /v1/jobs/{job['id']})")
