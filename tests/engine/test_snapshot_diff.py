"""Comparing snapshots bit for bit: the same state is identical whatever the
bytes, and the first difference is named by layer and index."""

from __future__ import annotations

from engine import Learner
from engine.snapshot import dump, load
from engine.snapshot_diff import first_difference
from tests.engine.test_learner import rows_and_labels, spec


def trained(task: str = "binary") -> Learner:
    rows, labels = rows_and_labels(task, 200, seed=3)
    learner = Learner.create(spec(task, hidden_layers=[4]), warmup=rows[:50],
                             warmup_labels=labels[:50])
    learner.learn(learner.encode(rows), learner.encode_labels(labels))
    return learner


def edited(data: bytes, name: str, index: int, value: float) -> bytes:
    arrays, meta = load(data)
    arrays[name][index] = value
    return dump(arrays, {k: v for k, v in meta.items() if k not in ("format", "format_version")})


def test_the_same_state_written_twice_is_identical() -> None:
    learner = trained()
    assert first_difference(learner.to_bytes(), trained().to_bytes()) is None


def test_a_changed_weight_is_named_by_layer_row_and_unit_with_the_gap() -> None:
    data = trained().to_bytes()  # inputs: flow, 3 levels, vfd = 5; then 4 hidden; 1 out
    arrays, _ = load(data)
    at = 5 * 4 + 4 + 2  # layer 1 is 6 x 4 (5 inputs and a bias row); layer 2 row 2
    changed = edited(data, "params", at, float(arrays["params"][at]) + 0.25)
    found = first_difference(data, changed)
    assert found is not None
    assert found.what == f"params: layer 2 weights[2, 0] (flat index {at})"
    assert found.by == abs(float(arrays["params"][at]) + 0.25 - float(arrays["params"][at]))
    bias = edited(data, "params", 5 * 4 + 1, 7.0)  # layer 1's bias row, unit 1
    assert first_difference(data, bias).what.startswith("params: layer 1 biases[1]")


def test_optimizer_state_is_compared_and_a_sign_of_zero_counts() -> None:
    data = trained().to_bytes()
    velocity = load(data)[0]["optimizer.velocity"]
    changed = edited(data, "optimizer.velocity", 3, float(velocity[3]) * (1 + 2**-52))
    assert first_difference(data, changed).what.startswith("optimizer.velocity: layer 1")
    # -0.0 == 0.0 as numbers, not as bits.
    plus = edited(data, "optimizer.velocity", 0, 0.0)
    minus = edited(data, "optimizer.velocity", 0, -0.0)
    found = first_difference(plus, minus)
    assert found is not None
    assert found.what == "optimizer.velocity: layer 1 weights[0, 0] (flat index 0)"


def test_metadata_counts_after_the_arrays() -> None:
    learner = trained()
    data = learner.to_bytes()
    learner.records_seen += 1
    found = first_difference(data, learner.to_bytes())
    assert found is not None and found.what == "metadata records_seen" and found.by == 1.0
