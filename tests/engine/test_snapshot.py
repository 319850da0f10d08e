"""Snapshots: bit-exact round trips, resume anywhere, no code on load, clear errors."""

from __future__ import annotations

import io
import json
import pickle

import numpy as np
import pytest

from engine import Learner, SnapshotError
from engine.snapshot import dump, load
from tests.engine.test_learner import rows_and_labels, spec


@pytest.mark.parametrize(("task", "optimizer", "nesterov"), [
    ("binary", "sgd", False), ("multiclass", "adam", False), ("regression", "sgd", True)])
def test_resume_at_a_random_record_boundary_gives_bit_identical_weights(task, optimizer,
                                                                        nesterov):
    rows, labels = rows_and_labels(task, 400, seed=4)
    settings = {"optimizer": optimizer, "nesterov": nesterov, "learning_rate": 0.02}
    uninterrupted = Learner.create(spec(task, training=settings), warmup=rows[:64],
                                   warmup_labels=labels[:64])
    X, Y = uninterrupted.encode(rows), uninterrupted.encode_labels(labels)
    uninterrupted.learn(X, Y)
    rng = np.random.default_rng(task.__len__())
    for cut in rng.integers(1, 399, size=3):
        first = Learner.create(spec(task, training=settings), warmup=rows[:64],
                               warmup_labels=labels[:64])
        first.learn(X[:cut], Y[:cut])
        resumed = Learner.from_bytes(first.to_bytes(extra={"cursor": int(cut)}))
        assert resumed.extra == {"cursor": int(cut)}
        resumed.learn(X[cut:], Y[cut:])
        assert np.array_equal(resumed.network.params, uninterrupted.network.params)
        assert resumed.prequential_metrics() == uninterrupted.prequential_metrics()
        assert np.array_equal(resumed.input_mean, uninterrupted.input_mean)
        assert resumed.records_seen == uninterrupted.records_seen == 400


def test_round_trip_is_bit_exact_for_every_array_and_counter():
    rows, labels = rows_and_labels("multiclass", 120)
    learner = Learner.create(spec("multiclass", training={"optimizer": "adam"}), warmup=rows)
    learner.learn(learner.encode(rows), learner.encode_labels(labels))
    copy = Learner.from_bytes(learner.to_bytes(extra={"note": "x", "n": [1, 2]}))
    assert np.array_equal(copy.network.params, learner.network.params)
    for name, value in learner.optimizer.state_arrays().items():
        assert np.array_equal(copy.optimizer.state_arrays()[name], value)
    assert copy.optimizer.step_count == learner.optimizer.step_count == 120
    for name, value in learner.encoder.arrays().items():
        assert np.array_equal(copy.encoder.arrays()[name], value)
    assert copy.records_seen == 120 and copy.spec == learner.spec
    assert copy.extra == {"note": "x", "n": [1, 2]}
    assert copy.prequential_metrics() == learner.prequential_metrics()
    X = learner.encode(rows[:5])
    assert np.array_equal(copy.predict(X), learner.predict(X))


def _valid_bytes() -> bytes:
    rows, labels = rows_and_labels("binary", 30)
    learner = Learner.create(spec(), warmup=rows)
    learner.learn(learner.encode(rows), learner.encode_labels(labels))
    return learner.to_bytes()


def test_truncated_or_corrupt_bytes_raise_snapshot_error():
    data = _valid_bytes()
    assert Learner.from_bytes(data).to_bytes() == data
    for cut in (0, 10, len(data) // 2, len(data) - 1):
        with pytest.raises(SnapshotError):
            Learner.from_bytes(data[:cut])
    rng = np.random.default_rng(0)
    for position in rng.integers(0, len(data), size=300):
        damaged = bytearray(data)
        damaged[position] ^= 0xFF
        try:
            Learner.from_bytes(bytes(damaged))
        except SnapshotError:
            continue
        # A flip in zip padding or a header field numpy does not read may leave every
        # array intact; then the load must be exact: saved again, it is the original
        # snapshot byte for byte (to_bytes is deterministic, see the round trip below).
        assert Learner.from_bytes(bytes(damaged)).to_bytes() == data, position
    with pytest.raises(SnapshotError):
        Learner.from_bytes(b"not a snapshot at all")


UNPICKLED = []


def _record_unpickling() -> str:
    UNPICKLED.append(True)
    return "ran"


class Trap:
    """Unpickling this object runs `_record_unpickling`."""

    def __reduce__(self):
        return (_record_unpickling, ())


def test_pickled_payloads_are_refused_without_being_run():
    """numpy.load(allow_pickle=False) refuses object arrays (numpy documentation)."""
    arrays, meta = load(_valid_bytes())
    buffer = io.BytesIO()
    np.savez(buffer, **arrays, trap=np.array([Trap()], dtype=object),
             __meta__=np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8))
    with pytest.raises(SnapshotError):
        Learner.from_bytes(buffer.getvalue())
    with pytest.raises(SnapshotError):
        Learner.from_bytes(pickle.dumps(Trap()))
    assert UNPICKLED == []


def _rewrite(data: bytes, change) -> bytes:
    arrays, meta = load(data)
    change(arrays, meta)
    meta = {k: v for k, v in meta.items() if k not in ("format", "format_version")}
    return dump(arrays, meta)


@pytest.mark.parametrize("change", [
    lambda a, m: m.update(spec_hash="0" * 64),
    lambda a, m: m["spec"].update(hidden_layers=[3]),
    lambda a, m: a.update(params=a["params"][:-1]),
    lambda a, m: a.update(params=np.full_like(a["params"], np.nan)),
    lambda a, m: a.pop("optimizer.velocity"),
    lambda a, m: m["optimizer"].update(kind="adam"),
    lambda a, m: a.update({"encoder.scale": -a["encoder.scale"]}),
    lambda a, m: m.pop("records_seen"),
    lambda a, m: a.update(input_sum=np.zeros(2)),
])
def test_incompatible_contents_raise_snapshot_error(change):
    with pytest.raises(SnapshotError):
        Learner.from_bytes(_rewrite(_valid_bytes(), change))


def test_another_format_version_is_refused():
    arrays, meta = load(_valid_bytes())
    buffer = io.BytesIO()
    meta["format_version"] = 99
    np.savez(buffer, **arrays,
             __meta__=np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8))
    with pytest.raises(SnapshotError, match="version"):
        Learner.from_bytes(buffer.getvalue())


def test_a_snapshot_with_the_old_schedule_spelling_loads_and_trains_on_unchanged():
    """Snapshots written before the rename say `power_t` and `invscaling`: they
    load with the same settings spelled the new way, and training resumes bit
    for bit as it would have from a snapshot written today."""
    rows, labels = rows_and_labels("binary", 200, seed=8)
    settings = {"learning_rate": 0.05, "lr_schedule": "inverse_power", "decay_exponent": 0.7}
    learner = Learner.create(spec("binary", training=settings), warmup=rows[:64])
    X, Y = learner.encode(rows), learner.encode_labels(labels)
    learner.learn(X[:90], Y[:90])
    current = learner.to_bytes()

    def old_spelling(arrays, meta):
        training = meta["spec"]["training"]
        training["power_t"] = training.pop("decay_exponent")
        training["lr_schedule"] = "invscaling"

    old = Learner.from_bytes(_rewrite(current, old_spelling))
    assert load(_rewrite(current, old_spelling))[1]["spec"]["training"]["power_t"] == 0.7
    new = Learner.from_bytes(current)
    assert old.spec == new.spec
    assert old.spec["training"]["lr_schedule"] == "inverse_power"
    assert old.spec["training"]["decay_exponent"] == 0.7 and "power_t" not in old.spec["training"]
    assert old.optimizer.rate() == new.optimizer.rate() == 0.05 / 91 ** 0.7
    old.learn(X[90:], Y[90:])
    new.learn(X[90:], Y[90:])
    assert np.array_equal(old.network.params, new.network.params)
