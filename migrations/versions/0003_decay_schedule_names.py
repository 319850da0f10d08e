"""training options renamed in stored specs: inverse_power and decay_exponent

Specs stored before this revision spell the decaying learning-rate schedule
``"lr_schedule": "invscaling"`` with its exponent ``"power_t"``; the engine
now reads ``"inverse_power"`` and ``"decay_exponent"`` (the same settings:
the rate at step t is learning_rate / t ** decay_exponent) and refuses the old
spelling. This rewrites ``models.spec`` on every backend (a JSON column), so
every existing model loads and trains. Snapshots keep the spelling they were
written with; the engine translates it when it loads one
(``engine.upgrade_legacy_spec``).

The translation is written out here rather than imported: a migration must
keep doing what it did when it shipped, whatever the engine becomes later.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-03 09:00:00
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None

_models = sa.table("models", sa.column("id", sa.Integer), sa.column("spec", sa.JSON))


def _renamed(spec: Any, keys: dict[str, str], schedules: dict[str, str]) -> Any:
    """``spec`` with its training keys and schedule names renamed, or None if
    nothing in it changes."""
    if not isinstance(spec, dict) or not isinstance(spec.get("training"), dict):
        return None
    training = dict(spec["training"])
    for old, new in keys.items():
        if old in training:
            value = training.pop(old)
            training.setdefault(new, value)
    schedule = training.get("lr_schedule")
    if isinstance(schedule, str) and schedule in schedules:
        training["lr_schedule"] = schedules[schedule]
    if training == spec["training"]:
        return None
    return {**spec, "training": training}


def _rewrite(change: Callable[[Any], Any]) -> None:
    connection = op.get_bind()
    rows = connection.execute(sa.select(_models.c.id, _models.c.spec)).all()
    updates = [{"model_id": model_id, "new_spec": new}
               for model_id, spec in rows if (new := change(spec)) is not None]
    if updates:
        connection.execute(
            _models.update().where(_models.c.id == sa.bindparam("model_id"))
            .values(spec=sa.bindparam("new_spec", type_=sa.JSON)),
            updates,
        )


def upgrade() -> None:
    _rewrite(lambda spec: _renamed(spec, {"power_t": "decay_exponent"},
                                   {"invscaling": "inverse_power"}))


def downgrade() -> None:
    _rewrite(lambda spec: _renamed(spec, {"decay_exponent": "power_t"},
                                   {"inverse_power": "invscaling"}))
