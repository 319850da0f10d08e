"""The worker's read path: stored JSON text decoded a column at a time, and
all-numeric rows encoded without a Python step per value, give exactly what
the per-value paths give (values, bits and errors)."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest

from engine import InvalidInputError, Learner
from service.store.database import make_engine, make_sessionmaker
from service.store.record_log import decode_column, decode_json, iter_chunks, read_after
from service.store.tables import RecordRow
from tests.worker.factories import create_model

# Values whose text round trip is easy to get wrong: 17 significant digits,
# the extremes of float64, an integer beyond 2**53.
AWKWARD = [0.1 + 0.2, 5e-324, 1.7976931348623157e308, -0.0, 2**53 + 1, 12345]


def stored_rows(n: int) -> list[dict[str, Any]]:
    labels: list[Any] = [True, False, "screw", 3, 2**53 + 1, 0.5]
    return [{"features": {"a": AWKWARD[i % len(AWKWARD)], "b": float(i) / 7.0},
             "label": labels[i % len(labels)], "split": "holdout" if i % 5 == 4 else "train"}
            for i in range(n)]


def test_records_read_back_exactly_as_stored(database_url: str) -> None:
    engine = make_engine(database_url, json_deserializer=decode_json)
    sessions = make_sessionmaker(engine, write=True)
    rows = stored_rows(23)
    with sessions() as session, session.begin():
        model_id = create_model(session).id
        session.add_all(RecordRow(model_id=model_id, **row) for row in rows)
    with sessions() as session:
        chunk = read_after(session, model_id, 0, 100)
        train = read_after(session, model_id, 0, 100, split="train")
    chunks = list(iter_chunks(sessions, model_id, int(chunk.seqs[-1]), 5))
    engine.dispose()

    assert len(chunk) == 23 and list(np.diff(chunk.seqs)) == [1] * 22
    for got, want in zip(chunk.features, rows, strict=True):
        for name, value in want["features"].items():
            assert type(got[name]) is type(value) and got[name] == value
            assert math.copysign(1.0, got[name]) == math.copysign(1.0, value)
    for got, want in zip(chunk.labels, rows, strict=True):
        assert type(got) is type(want["label"]) and got == want["label"]
    assert chunk.is_train.tolist() == [row["split"] == "train" for row in rows]
    assert len(train) == 19 and train.is_train.all()
    assert [len(part) for part in chunks] == [5, 5, 5, 5, 3]
    assert np.concatenate([part.seqs for part in chunks]).tolist() == chunk.seqs.tolist()
    assert [f for part in chunks for f in part.features] == chunk.features


@pytest.mark.parametrize("values", [
    ['{"a": 1.5}', '{"a": [1, 2]}', "true", '"text"', "null"],
    ['{"a": 1}', 2.5, 7],  # SQLite's NUMERIC affinity turned JSON numbers into numbers
    ['"x"', None],  # an SQL NULL
    [],
])
def test_a_column_decodes_as_each_value_alone(values: list[Any]) -> None:
    assert decode_column(values) == [None if v is None else decode_json(v) for v in values]


def test_a_corrupt_text_fails_as_it_does_alone() -> None:
    with pytest.raises(ValueError):
        decode_column(['{"a": 1}', '{"a": '])


def learner(fields: list[str]) -> Learner:
    spec = {"task": "binary", "features": [{"name": f, "type": "numeric"} for f in fields],
            "hidden_layers": [3]}
    rng = np.random.default_rng(7)
    warmup = [dict(zip(fields, row, strict=True)) for row in rng.normal(size=(40, len(fields)))]
    return Learner.create(spec, warmup=warmup)


@pytest.mark.parametrize("fields", [["a"], ["a", "b", "c"]])
def test_numeric_rows_encode_to_the_same_bits_on_both_paths(fields: list[str]) -> None:
    model = learner(fields)
    rng = np.random.default_rng(11)
    values = rng.normal(scale=1e3, size=(50, len(fields))).tolist()
    values[0][0] = AWKWARD[4]  # an int beyond 2**53: rounded the same way on both paths
    plain = [dict(zip(fields, row, strict=True)) for row in values]
    # A NumPy float is a number the one-call path does not take: the general path.
    general = [{k: np.float64(v) for k, v in row.items()} for row in plain]
    fast, slow = model.encode(plain), model.encode(general)
    assert fast.dtype == slow.dtype and fast.shape == slow.shape == (50, len(fields))
    assert fast.tobytes() == slow.tobytes()


@pytest.mark.parametrize(("row", "field", "message"), [
    ({"a": True, "b": 1.0}, "a", "must be a number"),
    ({"a": 1.0, "b": "2"}, "b", "must be a number"),
    ({"a": None, "b": 1.0}, "a", "must be a number"),
    ({"a": 1.0}, "b", "is missing"),
    ({"a": 1.0, "b": 2.0, "c": 3.0}, "c", "unknown field"),
    ({"a": math.nan, "b": 1.0}, "a", "must be finite"),
    ({"a": 10**400, "b": 1.0}, "a", "must be finite"),
    ([1.0, 2.0], None, "must be a mapping"),
])
def test_a_bad_row_among_good_ones_is_named_as_before(row: Any, field: str | None,
                                                      message: str) -> None:
    model = learner(["a", "b"])
    rows = [{"a": 0.5, "b": 1.5}] * 3 + [row] + [{"a": 0.5, "b": 1.5}]
    with pytest.raises(InvalidInputError) as caught:
        model.encode(rows)
    assert caught.value.field == field
    assert "row 3" in str(caught.value) and message in str(caught.value)
