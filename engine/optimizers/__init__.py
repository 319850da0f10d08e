"""The optimizers: SGD with momentum (optionally Nesterov) and Adam, over one
flat parameter vector (engine.optimizers.base has what they share)."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from engine.optimizers.adam import Adam
from engine.optimizers.base import Optimizer
from engine.optimizers.sgd import SGD

__all__ = ["SGD", "Adam", "Optimizer", "make_optimizer"]


def make_optimizer(n_params: int, training: Mapping[str, Any]) -> Optimizer:
    """The optimizer named by training['optimizer'] ('sgd' or 'adam')."""
    if training["optimizer"] == "adam":
        return Adam(n_params, training)
    return SGD(n_params, training)
