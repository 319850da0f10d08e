"""How a command prints a result object: one JSON object, or indented lines."""

from __future__ import annotations

import json
from typing import Any

import click


def emit(result: dict[str, Any], as_json: bool) -> None:
    if as_json:
        click.echo(json.dumps(result, indent=2, sort_keys=False))
    else:
        click.echo(describe(result))


def describe(value: Any, indent: str = "") -> str:
    if isinstance(value, dict):
        lines = []
        for key, item in value.items():
            if isinstance(item, dict | list):
                lines.append(f"{indent}{key}:")
                lines.append(describe(item, indent + "  "))
            else:
                lines.append(f"{indent}{key}: {item}")
        return "\n".join(lines)
    if isinstance(value, list):
        return "\n".join(describe(item, indent + "- ") for item in value)
    return f"{indent}{value}"
