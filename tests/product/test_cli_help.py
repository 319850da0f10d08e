"""Every `keelson` command answers --help, and the command table is there.

The command table is our own contract (docs/http-api.md, "The `keelson` command");
no outside source.
"""

from __future__ import annotations

import subprocess
import sys

import click
import pytest
from click.testing import CliRunner

from service.tools.cli import cli


def _all_commands(group: click.Group, prefix: tuple[str, ...] = ()) -> list[tuple[str, ...]]:
    found: list[tuple[str, ...]] = [prefix]
    for name, command in group.commands.items():
        if isinstance(command, click.Group):
            found.extend(_all_commands(command, (*prefix, name)))
        else:
            found.append((*prefix, name))
    return found


COMMANDS = _all_commands(cli)


def test_the_command_table_of_the_contract_is_complete() -> None:
    expected = {
        ("serve",), ("worker",), ("db", "upgrade"), ("token", "create"), ("token", "list"),
        ("token", "revoke"), ("demo",), ("import",), ("bench", "engine"), ("bench", "http"),
        ("bench", "worker"), ("outcomes", "import"), ("bench", "cases"),
        ("export-version",),
    }
    assert expected <= set(COMMANDS)


@pytest.mark.parametrize("path", COMMANDS, ids=lambda p: " ".join(p) or "keelson")
def test_every_command_answers_help_with_its_usage(path: tuple[str, ...]) -> None:
    result = CliRunner().invoke(cli, [*path, "--help"], prog_name="keelson")
    assert result.exit_code == 0, result.output
    assert result.output.startswith(f"Usage: keelson {' '.join(path)}".rstrip())
    assert "--help" in result.output


@pytest.mark.parametrize(
    ("option", "command"),
    [("--host", "serve"), ("--port", "serve"), ("--workers", "serve"), ("--no-worker", "serve"),
     ("--name", "token create"), ("--scope", "token create"), ("--json", "bench engine"),
     ("--json", "bench http"), ("--json", "bench worker")],
)
def test_the_options_of_the_contract_exist(option: str, command: str) -> None:
    result = CliRunner().invoke(cli, [*command.split(), "--help"], prog_name="keelson")
    assert option in result.output


def test_the_installed_console_script_runs_the_same_command() -> None:
    done = subprocess.run([sys.executable, "-m", "service", "--help"],
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 0
    assert "Usage:" in done.stdout


def test_an_unknown_command_fails_with_a_usage_error() -> None:
    result = CliRunner().invoke(cli, ["frobnicate"], prog_name="keelson")
    assert result.exit_code == 2
    assert "No such command 'frobnicate'" in result.output


def test_token_create_refuses_an_unknown_scope_before_touching_anything() -> None:
    result = CliRunner().invoke(cli, ["token", "create", "--name", "x", "--scope", "root"],
                                prog_name="keelson")
    assert result.exit_code == 2
    assert "'root' is not one of 'ingest', 'predict', 'admin'" in result.output
