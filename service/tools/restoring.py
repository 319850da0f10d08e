"""``keelson restore FILE --as NAME``: a version exported as a snapshot file
(``GET .../versions/{n}/export?format=snapshot``) becomes a new model of this
installation, with that version active.

Through the store, not over HTTP: restoring makes a model *and* an active
version in one go, which no HTTP route does (versions come from the worker,
never from a client), and opening such a route would let any admin token
upload weights. The command runs where ``KEELSON_DATABASE_URL`` points, as
``keelson import`` and ``keelson token`` do; the model is created by the very
use case behind ``POST /v1/models`` (its spec checked by the same schema and
size limits), then the version is stored in one transaction.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from marshmallow import ValidationError

from service.errors import InvalidInputError


def restore_file(config: dict[str, Any], path: Path, name: str) -> str:
    """Restore ``path`` as model ``name``; returns a line saying what was done."""
    from service.store.database import open_database
    from service.usecases.model_limits import ModelLimits
    from service.usecases.models import create_model
    from service.usecases.snapshot_file import install_version, read_snapshot_file
    from service.web.schemas.spec import ModelSpecSchema

    data = path.read_bytes()
    learner, provenance = read_snapshot_file(data)
    try:
        validated = ModelSpecSchema().load({**learner.spec, "name": name})
    except ValidationError as exc:
        raise InvalidInputError(f"The snapshot's spec is not valid here: {exc}") from exc
    database = open_database(config["KEELSON_DATABASE_URL"])
    try:
        create_model(database, validated, ModelLimits.from_config(config))
        number = install_version(database, name, data, provenance)
    finally:
        database.engine.dispose()
    source = (f" (version {provenance['version']} of {provenance['model']})"
              if "model" in provenance and "version" in provenance else "")
    return f"{path.name}{source} restored as model {name}, version {number} active"
