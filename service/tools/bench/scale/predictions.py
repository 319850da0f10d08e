"""Section "predictions": explained predictions round-robin over every model.

On the trained copy the fleet section leaves, a real gunicorn (2 API
processes, as ``keelson bench http`` runs it) answers ``GET
/v1/models/{name}/predictions?...&explain=integrated_gradients``; ``wrk``
(16 connections) sends each connection's requests to the models in turn
(a Lua script with one path per model), then to one model only. First every
path is asked 8 times (every version loaded in both processes, but for odds
of 1 in 128 each), and each run is preceded by a warm-up of the same length
(the target is for a warm cache). The ratio
``many_to_one`` is the round-robin rate over the one-model rate.

``version_cost``: what one loaded version holds in this process after one
explained prediction (weights, optimizer state, encoders, spec, workspaces;
service/versions/footprint.py), and how many such versions the default
budget holds.
"""

from __future__ import annotations

import json
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any
from urllib.parse import urlencode

import click

from service.tools.bench.http import _gunicorn, _wrk
from service.tools.bench.scale.fleet_data import FIELDS

Progress = Callable[[str], None]
WARM_ROUNDS = 8


def measure_predictions(url: str, names: list[str], duration: int, connections: int,
                        progress: Progress) -> dict[str, Any]:
    wrk = shutil.which("wrk")
    if wrk is None:
        raise click.ClickException("the predictions section needs wrk on PATH (Debian/Ubuntu: "
                                   "apt-get install wrk). Nothing was measured.")
    token = "scale-bench-" + "x" * 24
    query = urlencode({**{field: 0.25 * (k - 3) for k, field in enumerate(FIELDS)},
                       "explain": "integrated_gradients"})
    paths = [f"/v1/models/{name}/predictions?{query}" for name in names]
    figures: dict[str, Any] = {"models": len(names), "connections": connections,
                               "duration_s": duration, "api_processes": 2}
    with tempfile.TemporaryDirectory(prefix="keelson-bench-scale-") as scratch:
        many = _paths_script(Path(scratch) / "many.lua", paths)
        one = _paths_script(Path(scratch) / "one.lua", paths[:1])
        with _gunicorn(url, token, Path(scratch) / "gunicorn.log") as (base, server):
            auth = [f"Authorization: Bearer {token}"]
            progress("[predictions] loading every model's version in both processes")
            _warm(base, token, paths)
            for label, script in (("round_robin", many), ("one_model", one)):
                progress(f"[predictions] {label}: warm-up {duration} s, then {duration} s")
                _wrk(wrk, base + "/", auth, script, duration, connections, server)
                figures[label] = _wrk(wrk, base + "/", auth, script, duration, connections,
                                      server)
    rate_one = figures["one_model"]["requests_per_s"] or float("nan")
    figures["many_to_one"] = round(figures["round_robin"]["requests_per_s"] / rate_one, 3)
    figures["target_many_to_one"] = 0.8
    figures["version_cost"] = version_cost(url, names[0])
    return figures


def _warm(base: str, token: str, paths: list[str], rounds: int = WARM_ROUNDS) -> None:
    """Each path asked ``rounds`` times over 4 connections: which API process
    answers is the kernel's choice, so after 8 rounds a version is missing
    from one of the 2 processes with odds of 1 in 128."""
    import urllib.request
    from concurrent.futures import ThreadPoolExecutor

    def get(path: str) -> None:
        request = urllib.request.Request(base + path,
                                         headers={"Authorization": f"Bearer {token}"})
        with urllib.request.urlopen(request, timeout=60) as answer:
            answer.read()

    with ThreadPoolExecutor(4) as pool:
        list(pool.map(get, paths * rounds))


def _paths_script(path: Path, paths: list[str]) -> Path:
    # wrk's Lua: each thread walks the list in turn, one path per request.
    path.write_text("local paths = " + json.dumps(paths).replace("[", "{").replace("]", "}")
                    + "\nlocal i = 0\nrequest = function()\n  i = i % #paths + 1\n"
                    "  return wrk.format(\"GET\", paths[i])\nend\n")
    return path


def version_cost(url: str, name: str) -> dict[str, Any]:
    """One version loaded and used once here: its measured bytes, and the default budget's room."""
    from service.config import setting
    from service.store.database import make_engine, make_sessionmaker
    from service.usecases.predictions import PredictionOptions, predict
    from service.versions.cache import VersionCache
    from service.versions.footprint import MIB

    engine = make_engine(url)
    budget = float(setting("KEELSON_VERSION_CACHE_MIB").default)
    try:
        cache = VersionCache(make_sessionmaker(engine), budget_mib=budget)
        entry = cache.model(name)
        loaded = cache.version(entry)
        snapshot = len(loaded.learner.to_bytes())
        predict(cache, entry, [{field: 0.1 for field in FIELDS}], PredictionOptions())
        usage = cache.usage()
    finally:
        engine.dispose()
    per_version = usage["bytes"]
    return {"network": "7-16-8-1", "bytes_per_loaded_version": per_version,
            "snapshot_bytes": snapshot, "default_budget_mib": budget,
            "versions_in_default_budget": int(budget * MIB // per_version)}
