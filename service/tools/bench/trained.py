"""A benchmark's starting point: the demo model, trained, on a given database."""

from __future__ import annotations

import secrets
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from service.tools.demo import data as demo_data


@dataclass(frozen=True)
class TrainedDemo:
    """The database's backend name, the app configuration (with a fresh admin
    token), the app and an in-process client holding that token."""

    backend: str
    config: dict[str, Any]
    token: str
    app: Any
    api: Any


def trained_demo(url: str, records: int, progress: Callable[[str], None]) -> TrainedDemo:
    """Migrate ``url``, create the demo model through the API, send it
    ``records`` generated records and train until a version is active."""
    from service.config import load_config
    from service.store.schema import upgrade_database
    from service.tools.demo.run import (
        InProcessApi,
        create_demo_model,
        send_records,
        train_until_current,
    )
    from service.web.app import create_app

    backend = url.split(":", 1)[0].split("+", 1)[0]
    progress(f"[{backend}] preparing a trained model")
    upgrade_database(url)
    token = secrets.token_urlsafe(24)
    config = load_config({"KEELSON_DATABASE_URL": url, "KEELSON_ADMIN_TOKEN": token})
    app = create_app(config)
    api = InProcessApi(app, token)
    create_demo_model(api, progress)
    send_records(api, demo_data.generate_records(records, seed=11), records, progress)
    train_until_current(api, config, progress, idle_seconds=0.5)
    return TrainedDemo(backend, config, token, app, api)
