"""Configuration: read once from the environment, overridable by a mapping.

The keys are the environment variable names themselves, so a test's mapping,
a deployment's environment and ``current_app.config`` all say the same thing.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from typing import Any

MIB = 1024 * 1024

# Every setting with its default and how to read it from a string.
DEFAULTS: dict[str, Any] = {
    "KEELSON_DATABASE_URL": "sqlite:///keelson.db",
    "KEELSON_ADMIN_TOKEN": None,
    "KEELSON_MAX_BODY_BYTES": 16 * MIB,
    "KEELSON_MAX_RECORDS_PER_REQUEST": 10_000,
    "KEELSON_MAX_PREDICTION_BATCH": 1_000,
    "KEELSON_ACTIVE_STALENESS_SECONDS": 1.0,
    "KEELSON_VERSION_CACHE_SIZE": 32,
    "KEELSON_TOKEN_CACHE_SECONDS": 1.0,
    # Budget units per prediction request, about records x rows evaluated per
    # record x parameters (service/usecases/prediction_limits.py); the default
    # keeps a request under about 2 s of one core (README, "Request budget").
    "KEELSON_PREDICTION_BUDGET": 8_000_000_000,
    "KEELSON_PREDICTION_DEADLINE_SECONDS": 10.0,
}

_PARSERS: dict[str, Any] = {
    "KEELSON_MAX_BODY_BYTES": int,
    "KEELSON_MAX_RECORDS_PER_REQUEST": int,
    "KEELSON_MAX_PREDICTION_BATCH": int,
    "KEELSON_ACTIVE_STALENESS_SECONDS": float,
    "KEELSON_VERSION_CACHE_SIZE": int,
    "KEELSON_TOKEN_CACHE_SECONDS": float,
    "KEELSON_PREDICTION_BUDGET": int,
    "KEELSON_PREDICTION_DEADLINE_SECONDS": float,
}


class ConfigError(ValueError):
    """A setting has a value Keelson cannot use."""


def load_config(
    overrides: Mapping[str, Any] | None = None, environ: Mapping[str, str] | None = None
) -> dict[str, Any]:
    """The settings: defaults, then the environment, then ``overrides``.

    Values from the environment are strings and are parsed; an empty
    ``KEELSON_ADMIN_TOKEN`` counts as unset (a blank token must never match).
    """
    env = os.environ if environ is None else environ
    config = dict(DEFAULTS)
    for key in DEFAULTS:
        raw = env.get(key)
        if raw is None or raw == "":
            continue
        parse = _PARSERS.get(key, str)
        try:
            config[key] = parse(raw)
        except ValueError as exc:
            raise ConfigError(f"{key}={raw!r} is not a valid {parse.__name__}") from exc
    if overrides:
        config.update(overrides)
    if not config.get("KEELSON_ADMIN_TOKEN"):
        config["KEELSON_ADMIN_TOKEN"] = None
    for key, parse in _PARSERS.items():
        if not isinstance(config[key], int | float) or config[key] <= 0:
            raise ConfigError(f"{key} must be a positive {parse.__name__}")
    return config
