"""Use case: change a model's settings in place (PATCH /v1/models/{name}).

A change takes effect after the model's last record at the moment it is made
(``at_seq``, found under the model's row lock, which ingestion holds while it
adds records: every record up to it was learned under the old settings, every
later one under the new). The worker applies it at that record
(service/worker/lineage.py), and each version says from which change's
position its settings are (``settings_from_seq``).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import engine
from service.errors import InvalidInputError
from service.store.database import Database, transaction
from service.store.model_events import SETTINGS_CHANGED, add_event, last_seq, settings_of
from service.usecases.common import find_model
from service.usecases.model_limits import ModelLimits, size_errors

# Settings held as a mapping and merged key by key; the others are replaced.
MERGED = ("training", "alarm")


def merged_spec(spec: Mapping[str, Any], changes: Mapping[str, Any]) -> dict[str, Any]:
    new = dict(spec)
    for key, value in changes.items():
        new[key] = {**spec.get(key, {}), **value} if key in MERGED else value
    return new


def differences(old: Mapping[str, Any], new: Mapping[str, Any]) -> dict[str, Any]:
    """{"training.learning_rate": {"from": 0.01, "to": 0.002}, ...}."""
    found: dict[str, Any] = {}
    for key in sorted(set(old) | set(new)):
        before, after = old.get(key), new.get(key)
        if key in MERGED and isinstance(before, dict) and isinstance(after, dict):
            for inner, change in differences(before, after).items():
                found[f"{key}.{inner}"] = change
        elif before != after:
            found[key] = {"from": before, "to": after}
    return found


def change_settings(db: Database, name: str, changes: Mapping[str, Any], limits: ModelLimits,
                    *, token: str | None, reason: str | None) -> dict[str, Any]:
    """Apply validated ``changes`` (promotion, training, alarm) to the stored
    spec; a change that changes nothing records nothing. Returns the event
    view (None when nothing changed) for the caller to answer with the model."""
    with transaction(db.write) as session:
        model = find_model(session, name, lock=True)
        try:
            spec = engine.apply_defaults(merged_spec(model.spec, changes))
        except engine.InvalidInputError as exc:
            raise InvalidInputError("The settings are invalid.",
                                    errors={exc.field or "body": [str(exc)]}) from exc
        too_large = size_errors(spec, limits)
        if too_large:  # e.g. checkpoint_every below what the version size allows
            raise InvalidInputError("The model is larger than this server allows.",
                                    errors=too_large)
        changed = differences(model.spec, spec)
        if not changed:
            return {}
        model.spec = spec
        at_seq = last_seq(session, model.id)
        add_event(session, model.id, SETTINGS_CHANGED, token=token, reason=reason,
                  at_seq=at_seq, details={"changes": changed, "settings": settings_of(spec)})
        return changed
