"""engine.sizes: the layer sizes, parameter count and snapshot bound of a spec
agree with what the engine builds and writes."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from engine import Learner, apply_defaults
from engine.optimizers import make_optimizer
from engine.sizes import (
    input_width,
    layer_sizes,
    min_checkpoint_every,
    parameter_count,
    snapshot_bytes,
)


def _spec(task: str = "binary", *, numeric: int = 2, levels: tuple[int, ...] = (3,),
          hidden: list[int] | None = None, optimizer: str = "sgd",
          classes: int = 3) -> dict[str, Any]:
    features: list[dict[str, Any]] = [{"name": f"n{i}", "type": "numeric"}
                                      for i in range(numeric)]
    features += [{"name": f"c{i}", "type": "categorical",
                  "levels": [f"level-{j}" for j in range(count)]}
                 for i, count in enumerate(levels)]
    spec: dict[str, Any] = {"name": "pump-size", "task": task, "target": "y",
                            "features": features, "training": {"optimizer": optimizer}}
    if hidden is not None:
        spec["hidden_layers"] = hidden
    if task == "multiclass":
        spec["classes"] = [f"class-{k}" for k in range(classes)]
    return apply_defaults(spec)


def _trained(spec: dict[str, Any], n: int = 64) -> Learner:
    """A learner whose weights moved off their start (noise to a compressor)."""
    rng = np.random.default_rng(3)
    rows = []
    for _ in range(n):
        row: dict[str, Any] = {f["name"]: float(rng.normal()) for f in spec["features"]
                               if f["type"] == "numeric"}
        row.update({f["name"]: f["levels"][int(rng.integers(len(f["levels"])))]
                    for f in spec["features"] if f["type"] == "categorical"})
        rows.append(row)
    labels: list[Any]
    if spec["task"] == "regression":
        labels = [float(i) for i in range(n)]
    else:
        labels = [spec["classes"][i % len(spec["classes"])] for i in range(n)]
    learner = Learner.create(spec, warmup=rows, warmup_labels=labels)
    learner.learn(learner.encode(rows), learner.encode_labels(labels))
    return learner


SPECS = [
    _spec(),
    _spec(hidden=[]),
    _spec("regression", numeric=5, levels=(), hidden=[8]),
    _spec("multiclass", levels=(4, 2), classes=5, optimizer="adam"),
    _spec("binary", numeric=20, levels=(16,), hidden=[256, 128], optimizer="adam"),
    _spec("multiclass", numeric=30, levels=(), hidden=[512, 64], classes=40),
]


@pytest.mark.parametrize("spec", SPECS)
def test_the_sizes_are_the_network_the_engine_builds(spec: dict[str, Any]) -> None:
    learner = Learner.create(spec)
    assert layer_sizes(spec) == learner.network.sizes
    assert parameter_count(spec) == learner.network.params.size


def test_the_parameter_count_follows_the_layout_by_hand() -> None:
    # Two numeric inputs and a categorical one of three levels: 5 inputs; one
    # hidden layer of 4; one binary output. Each layer: (inputs + bias) x outputs.
    spec = _spec(numeric=2, levels=(3,), hidden=[4])
    assert input_width(spec) == 2 + 3
    assert parameter_count(spec) == (5 + 1) * 4 + (4 + 1) * 1


@pytest.mark.parametrize("optimizer", ["sgd", "adam"])
def test_each_optimizer_states_how_many_vectors_it_snapshots(optimizer: str) -> None:
    spec = _spec(optimizer=optimizer)
    made = make_optimizer(10, spec["training"])
    assert made.state_vectors == len(made.state_arrays())


@pytest.mark.parametrize("spec", SPECS)
def test_a_snapshot_never_exceeds_its_bound(spec: dict[str, Any]) -> None:
    written = _trained(spec).to_bytes(extra={"cursor": 10**12, "encoder": "version:123456",
                                             "records_before": 10**9, "model_id": 10**6})
    assert len(written) <= snapshot_bytes(spec)


def test_the_bound_is_close_for_a_large_network() -> None:
    spec = _spec("binary", numeric=40, levels=(24,), hidden=[512, 256])
    written = len(_trained(spec).to_bytes())
    # Deflate saves about 6 per cent on float64 noise here (measured).
    assert written <= snapshot_bytes(spec) <= 1.10 * written


def test_the_smallest_spacing_keeps_bytes_per_record_under_the_floor() -> None:
    spec = _spec("binary", numeric=40, levels=(24,), hidden=[512, 256])
    floor = 65_536
    spacing = min_checkpoint_every(spec, floor)
    assert snapshot_bytes(spec) / spacing <= floor < snapshot_bytes(spec) / (spacing - 1)
    assert min_checkpoint_every(_spec("regression", hidden=[4]), floor) == 1
