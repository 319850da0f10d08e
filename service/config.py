"""Every setting a Keelson process reads, in one registry.

A setting is an environment variable with a default, a parser and a one-line
meaning. Everything that reads one reads it here: the API app
(``load_config``, whose keys are the variable names themselves, so a test's
mapping, a deployment's environment and ``current_app.config`` say the same
thing), the gunicorn settings (service/web/server.py), the worker
(service/worker/settings.py), logging, migrations and the ``keelson`` command.
The README's configuration table lists exactly these settings with these
defaults; tests/test_settings_table.py holds the two together.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

MIB = 1024 * 1024


class ConfigError(ValueError):
    """A setting has a value Keelson cannot use."""


# -- parsers: a value from the environment (text) or from a mapping (typed) --
def text(value: Any) -> str:
    """Any text, kept as given."""
    if not isinstance(value, str):
        raise ValueError("must be text")
    return value


def secret_key(value: Any) -> str:
    """Text of at least 32 characters (a key that signs)."""
    if not isinstance(value, str) or len(value) < 32:
        raise ValueError("must be at least 32 characters")
    return value


def whole_number(value: Any) -> int:
    """An integer: ``8``, not ``8.0``."""
    if isinstance(value, int | str) and not isinstance(value, bool):
        try:
            return int(value)  # text: refuses "8.0" and "eight"
        except ValueError:
            pass
    raise ValueError("must be a whole number")


def number(value: Any) -> float:
    """A number: ``0.5``, ``3``."""
    if isinstance(value, int | float | str) and not isinstance(value, bool):
        try:
            return float(value)
        except ValueError:
            pass
    raise ValueError("must be a number")


def positive_whole_number(value: Any) -> int:
    parsed = whole_number(value)
    if parsed <= 0:
        raise ValueError("must be a whole number above 0")
    return parsed


def positive_number(value: Any) -> float:
    parsed = number(value)
    if not parsed > 0:  # NaN too
        raise ValueError("must be a number above 0")
    return parsed


def exact_shapley_fields(value: Any) -> int:
    """A field count from 1 to 16 (engine.shapley.MAX_EXACT_FIELDS: 2^16 coalitions)."""
    parsed = whole_number(value)
    if not 1 <= parsed <= 16:
        raise ValueError("must be a whole number from 1 to 16")
    return parsed


FLAG_ON = ("1", "true", "yes")
FLAG_OFF = ("0", "false", "no")


def flag(value: Any) -> bool:
    """``1``/``true``/``yes`` or ``0``/``false``/``no``; anything else is refused."""
    if isinstance(value, bool):
        return value
    spelled = str(value).strip().lower()
    if spelled in FLAG_ON:
        return True
    if spelled in FLAG_OFF:
        return False
    raise ValueError("must be 1 or 0")


def on_unless_off(value: Any) -> bool:
    """Off only for ``0``/``false``/``no``; any other value leaves it on."""
    if isinstance(value, bool):
        return value
    return str(value).strip().lower() not in FLAG_OFF


LOG_LEVELS = ("debug", "info", "warning", "error", "critical")


def log_level(value: Any) -> str:
    """A logging level name, any case (kept in lower case)."""
    spelled = str(value).strip().lower()
    if spelled not in LOG_LEVELS:
        raise ValueError(f"must be one of {', '.join(LOG_LEVELS)}")
    return spelled


def default_web_workers() -> int:
    return min(2 * (os.cpu_count() or 1) + 1, 8)


# -- the registry -------------------------------------------------------------
@dataclass(frozen=True)
class Setting:
    name: str
    read_by: str  # which processes read it (the README's grouping)
    default: Any  # None: unset
    parse: Callable[[Any], Any]
    meaning: str
    # A default worked out where the process starts, in words; ``compute``
    # works it out (when it is not, the reader does: see its meaning).
    shown: str | None = None
    compute: Callable[[], Any] | None = None

    @property
    def default_text(self) -> str:
        """The default as the README shows it."""
        return self.shown if self.shown is not None else render(self.default)

    def value(self, given: Any) -> Any:
        """``given`` (environment text or a mapping's value) parsed; the
        default when it is missing or blank."""
        if given is None or (isinstance(given, str) and not given.strip()):
            return self.compute() if self.compute is not None else self.default
        try:
            return self.parse(given)
        except (TypeError, ValueError) as exc:
            raise ConfigError(f"{self.name}={given!r}: {exc}") from None


def render(value: Any) -> str:
    """A default as it would be written in the environment (``unset`` for none)."""
    if value is None:
        return "unset"
    if isinstance(value, bool):
        return "`1`" if value else "`0`"
    return f"`{value}`"


EVERY_PROCESS, API, SERVER, WORKER, TOOLS = (
    "every process", "API", "`keelson serve`, gunicorn", "worker", "benchmarks")

SETTINGS: tuple[Setting, ...] = (
    Setting("KEELSON_DATABASE_URL", EVERY_PROCESS, "sqlite:///keelson.db", text,
            "SQLAlchemy URL: `sqlite:///path.db` (relative to the current folder) or "
            "`postgresql+psycopg://user:pw@host/db`"),
    Setting("KEELSON_LOG_LEVEL", EVERY_PROCESS, "info", log_level,
            "`debug`, `info`, `warning`, `error` or `critical`; logs are one JSON object "
            "per line with the `request_id`"),
    Setting("KEELSON_ADMIN_TOKEN", API, None, text,
            "a bearer token with every scope (otherwise create tokens with "
            "`keelson token create`); blank counts as unset"),
    Setting("KEELSON_SECRET_KEY", API, None, secret_key,
            "the key that signs page session cookies and CSRF tokens (at least 32 "
            "characters); blank: one is generated once and kept in the database"),
    Setting("KEELSON_SESSION_HOURS", API, 12.0, positive_number,
            "how long a page session lasts after signing in"),
    Setting("KEELSON_MAX_BODY_BYTES", API, 16 * MIB, positive_whole_number,
            "largest request body in bytes (16 MiB; 413 beyond)"),
    Setting("KEELSON_MAX_RECORDS_PER_REQUEST", API, 10_000, positive_whole_number,
            "records per ingest request (413 beyond)"),
    Setting("KEELSON_MAX_PREDICTION_BATCH", API, 1_000, positive_whole_number,
            "records per prediction request (413 beyond)"),
    Setting("KEELSON_MAX_SPEC_BYTES", API, 65_536, positive_whole_number,
            "largest model spec (the body of POST /v1/models) in bytes (422 beyond)"),
    Setting("KEELSON_MAX_FEATURES", API, 256, positive_whole_number,
            "features a model may declare (422 beyond)"),
    Setting("KEELSON_MAX_LEVELS", API, 256, positive_whole_number,
            "levels one categorical feature may list (422 beyond)"),
    Setting("KEELSON_MAX_CLASSES", API, 100, positive_whole_number,
            "classes a multiclass model may list (422 beyond)"),
    Setting("KEELSON_MAX_PARAMETERS", API, 1_000_000, positive_whole_number,
            "weights and biases a model's network may have (422 beyond)"),
    Setting("KEELSON_MAX_VERSION_BYTES_PER_RECORD", API, 65_536, positive_whole_number,
            "snapshot bytes a model may write per record between its versions: a spec whose "
            "`checkpoint_every` is below its snapshot's size over this is refused (422 "
            "stating the smallest allowed)"),
    Setting("KEELSON_ACTIVE_STALENESS_SECONDS", API, 1.0, positive_number,
            "how long an API process may serve a replaced active version (at most 1)"),
    Setting("KEELSON_VERSION_CACHE_MIB", API, 128.0, positive_number,
            "memory for loaded versions per API process, in MiB (each version's cost is "
            "measured when it loads; the least recently used go first)"),
    Setting("KEELSON_TOKEN_CACHE_SECONDS", API, 1.0, positive_number,
            "how long an API process trusts a token it looked up (a revocation takes "
            "effect within this)"),
    Setting("KEELSON_PREDICTION_BUDGET", API, 8_000_000_000, positive_whole_number,
            "largest cost of one prediction request, about records x rows evaluated per "
            "record x parameters, plus 500 per byte its answer may take (422 beyond; "
            "README, \"Request budget\")"),
    Setting("KEELSON_PREDICTION_DEADLINE_SECONDS", API, 10.0, positive_number,
            "seconds a prediction request may compute before it answers 503"),
    Setting("KEELSON_SHAPLEY_EXACT_FIELDS", API, 12, exact_shapley_fields,
            "most fields whose Shapley values `explain=shapley` computes exactly, over all "
            "2^fields coalitions (1 to 16); a model with more needs `samples` (422 without)"),
    Setting("KEELSON_DRIFT", API, True, flag,
            "`1`: each API process counts every prediction's fields for GET "
            "/v1/models/{name}/drift; `0`: nothing is counted"),
    Setting("KEELSON_DRIFT_FLUSH_SECONDS", API, 10.0, positive_number,
            "seconds between an API process's writes of its drift counts (a process that "
            "dies loses at most this much drift data)"),
    Setting("KEELSON_HOST", SERVER, "127.0.0.1", text, "address the API listens on"),
    Setting("KEELSON_PORT", SERVER, 8000, whole_number, "port the API listens on"),
    Setting("KEELSON_WEB_WORKERS", SERVER, None, whole_number,
            "gunicorn worker processes (`--workers`)",
            shown="2 x CPUs + 1, at most 8", compute=default_web_workers),
    Setting("KEELSON_THREADS", SERVER, 4, whole_number, "threads per gunicorn worker"),
    Setting("KEELSON_TIMEOUT", SERVER, 30, whole_number,
            "seconds a silent gunicorn worker lives before it is restarted"),
    Setting("KEELSON_GRACEFUL_TIMEOUT", SERVER, 20, whole_number,
            "seconds in-flight requests get after SIGTERM"),
    Setting("KEELSON_KEEPALIVE", SERVER, 5, whole_number,
            "seconds an idle keep-alive connection stays open"),
    Setting("KEELSON_HEADER_TIMEOUT", SERVER, 10.0, positive_number,
            "seconds a client has to send a request head, from its first byte (408 after)"),
    Setting("KEELSON_BODY_TIMEOUT", SERVER, 60.0, positive_number,
            "seconds a client has to send a body once its head is in (408 after)"),
    Setting("KEELSON_SEND_TIMEOUT", SERVER, 30.0, positive_number,
            "seconds a client has to take an answer before the connection is closed"),
    Setting("KEELSON_MAX_HEAD_BYTES", SERVER, 32 * 1024, positive_whole_number,
            "largest request head in bytes (431 beyond)"),
    Setting("KEELSON_REUSE_PORT", SERVER, True, flag,
            "`1`: each API process listens on its own socket (`SO_REUSEPORT`), so the "
            "kernel spreads connections evenly, and `keelson serve` refuses an address "
            "another server already listens on; `0`: one shared socket"),
    Setting("KEELSON_ACCESS_LOG", SERVER, True, on_unless_off,
            "`0` (or `false`, `no`) silences the JSON access log on stdout"),
    Setting("PROMETHEUS_MULTIPROC_DIR", SERVER, None, text,
            "folder where the API processes share metric samples (unset: `keelson serve` "
            "and the gunicorn settings make a fresh one)",
            shown="a fresh temporary folder"),
    Setting("FORWARDED_ALLOW_IPS", SERVER, "127.0.0.1", text,
            "front ends (addresses or networks, comma-separated; `*` for any) whose "
            "scheme headers (`X-Forwarded-Proto` and the like) gunicorn trusts"),
    Setting("KEELSON_WORKER_LEASE_SECONDS", WORKER, 30.0, number,
            "how long a model stays with a worker that stopped renewing its lease "
            "(renewed every third of it)"),
    Setting("KEELSON_WORKER_IDLE_SECONDS", WORKER, 3.0, number,
            "quiet time after which the worker writes a version of what it applied"),
    Setting("KEELSON_WORKER_POLL_SECONDS", WORKER, 0.25, number,
            "sleep between polls when there is nothing to do"),
    Setting("KEELSON_WORKER_CLAIM_SECONDS", WORKER, 1.0, number,
            "how often the worker looks for models free to lease"),
    Setting("KEELSON_WORKER_CHUNK_RECORDS", WORKER, 1000, whole_number,
            "records read (and encoded) per query"),
    Setting("KEELSON_WORKER_HOLDOUT_WINDOW", WORKER, 10_000, whole_number,
            "latest holdout records a version is evaluated (and promoted) on"),
    Setting("KEELSON_WORKER_MAX_MODELS", WORKER, None, whole_number,
            "models one worker leases at most (unset: as many as are free)"),
    Setting("KEELSON_WORKER_RELEASE_SECONDS", WORKER, 60.0, number,
            "how long a caught-up model (every record applied and stored) stays leased "
            "and loaded; then its lease is released and its memory freed, and the first "
            "worker with room claims it again when records come"),
    Setting("KEELSON_WORKER_PROGRESS_SECONDS", WORKER, 1.0, number,
            "seconds between progress writes of a running retrain job"),
    Setting("KEELSON_WORKER_RETRY_SECONDS", WORKER, 1.0, positive_number,
            "first wait before a model the worker could not load or train is tried "
            "again (doubled with each failed try)"),
    Setting("KEELSON_WORKER_RETRY_MAX_SECONDS", WORKER, 300.0, positive_number,
            "longest wait between tries of such a model"),
    Setting("KEELSON_CASE_RETENTION_DAYS", WORKER, 180.0, positive_number,
            "days a scored case waits for its outcome; older ones without an outcome are "
            "deleted by the worker, in batches"),
    Setting("KEELSON_WORKER_DELETE_BATCH", WORKER, 2000, positive_whole_number,
            "rows a model's delete job removes per transaction"),
    Setting("KEELSON_SNAPSHOT_RETENTION_DAYS", WORKER, 30.0, positive_number,
            "days after which the snapshot of an online version that was never active is "
            "pruned by the worker (the version's row, metrics and lineage stay; `keelson "
            "replay --store` rebuilds it)"),
    Setting("KEELSON_SNAPSHOT_KEEP_LAST", WORKER, 20, whole_number,
            "newest versions of each model whose snapshots are never pruned, whatever their age"),
    Setting("KEELSON_DRIFT_TALLY_RETENTION_DAYS", WORKER, 400.0, positive_number,
            "days after which the worker deletes drift tallies (hourly prediction counts); keep "
            "it above 366, the longest drift window, to answer every window whole"),
    Setting("KEELSON_TOMBSTONE_RETENTION_DAYS", WORKER, 30.0, positive_number,
            "days a deleted model's row and its finished delete job stay readable (GET "
            "/v1/jobs/{id}) before the worker removes them"),
    Setting("KEELSON_BENCH_POSTGRES_URL", TOOLS, None, text,
            "PostgreSQL server `keelson bench http`, `keelson bench worker` and `keelson "
            "bench cases` also measure on (in a scratch database; same as `--postgres-url`)"),
)
BY_NAME: dict[str, Setting] = {setting.name: setting for setting in SETTINGS}


def setting(name: str) -> Setting:
    return BY_NAME[name]


def read_setting(name: str, environ: Mapping[str, str] | None = None) -> Any:
    """One setting's value from the environment (``os.environ`` by default)."""
    env = os.environ if environ is None else environ
    return BY_NAME[name].value(env.get(name))


# Settings an earlier release read and this one does not, with what replaced
# each: a process that finds one set says so in its log once at start, so an
# upgrade does not silently drop an operator's choice.
RETIRED_SETTINGS: dict[str, str] = {
    "KEELSON_VERSION_CACHE_SIZE": "KEELSON_VERSION_CACHE_MIB (memory in MiB, not a count "
                                  "of versions; each version's cost is measured when it loads)",
}


def warn_of_retired(environ: Mapping[str, str] | None = None) -> list[str]:
    """Log (and return) a warning for each retired setting that is set."""
    env = os.environ if environ is None else environ
    said = [f"{name} is no longer read; set {instead} instead"
            for name, instead in RETIRED_SETTINGS.items() if (env.get(name) or "").strip()]
    for line in said:
        logging.getLogger("keelson").warning(line)
    return said


# -- the API app's settings -----------------------------------------------------
APP_SETTINGS = tuple(s for s in SETTINGS if s.read_by in (EVERY_PROCESS, API))
DEFAULTS: dict[str, Any] = {s.name: s.default for s in APP_SETTINGS}


def load_config(
    overrides: Mapping[str, Any] | None = None, environ: Mapping[str, str] | None = None
) -> dict[str, Any]:
    """The API app's settings: defaults, then the environment, then ``overrides``
    (each checked by its setting's parser; a missing or blank value takes the
    default, so an empty ``KEELSON_ADMIN_TOKEN`` can never match a token)."""
    env = os.environ if environ is None else environ
    config = {s.name: s.value(env.get(s.name)) for s in APP_SETTINGS}
    for key, given in (overrides or {}).items():
        known = BY_NAME.get(key)
        config[key] = given if known is None else known.value(given)
    return config
