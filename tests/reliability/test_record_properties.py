"""Property tests of the records contract over random feature specs, through
the HTTP API (tests/service/test_record_rules.py holds the fast checker, the
marshmallow schema and the JSON Schema documents to each other; this goes end
to end).

For any spec hypothesis draws (1-6 features of every type, optional bounds,
levels, every task and class type): the spec is accepted; a batch of records
drawn to fit it is stored whole and reads back as sent (numbers as floats);
the same batch with one record broken in one way (missing, unknown, wrongly
typed, out-of-bounds or non-finite field, unknown level, unknown class) is
refused with 422 naming that record's field path, and stores nothing
(docs/http-api.md, "Records"; docs/architecture.md, invariant 5). 60 specs in CI; more with
``KEELSON_PROPERTY_EXAMPLES=1000``.
"""

from __future__ import annotations

import itertools
import json
import os
from collections.abc import Iterator
from typing import Any

import pytest
from flask import Flask
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from sqlalchemy import select

from service.store.tables import ModelRow, RecordRow
from service.web.extensions import get_database
from tests.service.conftest import build_app
from tests.service.helpers import ADMIN_TOKEN
from tests.service.spec_strategies import model_spec, valid_batch

BREAKS = ["missing", "unknown", "null", "string-for-number", "number-for-level",
          "above-max", "below-min", "unknown-level", "non-boolean", "unknown-class",
          "string-label-for-regression", "object-value"]


def break_one(draw: st.DrawFn, spec: dict[str, Any], batch: list[dict[str, Any]]
              ) -> tuple[list[dict[str, Any]], str, str]:
    """A copy of ``batch`` with one field of one record broken; (batch, body,
    the field path the answer must name)."""
    index = draw(st.integers(0, len(batch) - 1))
    broken = json.loads(json.dumps(batch))
    record = broken[index]
    feature = draw(st.sampled_from(spec["features"]))
    name, path = feature["name"], f"records.{index}.features.{feature['name']}"
    how = draw(st.sampled_from(BREAKS))
    if how == "missing":
        del record["features"][name]
    elif how == "unknown":
        name = "zz_not_declared"
        record["features"][name] = 1
        path = f"records.{index}.features.{name}"
    elif how == "null":
        record["features"][name] = None
    elif how == "object-value":
        record["features"][name] = {"$gt": 0}
    elif how == "string-for-number":
        assume(feature["type"] == "numeric")
        record["features"][name] = "1; DROP TABLE records"
    elif how == "number-for-level":
        assume(feature["type"] == "categorical")
        record["features"][name] = 3
    elif how == "above-max":
        assume("max" in feature)
        record["features"][name] = feature["max"] + max(1.0, abs(feature["max"]))
    elif how == "below-min":
        assume("min" in feature)
        record["features"][name] = feature["min"] - max(1.0, abs(feature["min"]))
    elif how == "unknown-level":
        assume(feature["type"] == "categorical")
        record["features"][name] = "".join(feature["levels"]) + "?"
    elif how == "non-boolean":
        assume(feature["type"] == "boolean")
        record["features"][name] = draw(st.sampled_from([0, 1, "true", "yes"]))
    elif how == "unknown-class":
        assume("classes" in spec)
        record["label"] = "never-a-class" if isinstance(spec["classes"][0], int) else 999
        path = f"records.{index}.label"
    elif how == "string-label-for-regression":
        assume(spec["task"] == "regression")
        record["label"] = "12.5"
        path = f"records.{index}.label"
    return broken, json.dumps({"records": broken}), path


NUMBERS = itertools.count()
EXAMPLES = int(os.environ.get("KEELSON_PROPERTY_EXAMPLES", "60"))


@pytest.fixture
def shared_app(sqlite_url: str) -> Iterator[Flask]:
    app = build_app(sqlite_url)
    yield app
    get_database(app).engine.dispose()


def stored(app: Flask, model: str) -> list[tuple[dict[str, Any], Any]]:
    with get_database(app).read() as session:
        return [(r.features, r.label) for r in session.execute(
            select(RecordRow.features, RecordRow.label).join(ModelRow)
            .where(ModelRow.name == model).order_by(RecordRow.seq))]


def post(client: Any, path: str, body: Any) -> Any:
    data = body if isinstance(body, str) else json.dumps(body)
    return client.post(path, data=data, content_type="application/json",
                       headers={"Authorization": f"Bearer {ADMIN_TOKEN}"})


@settings(max_examples=EXAMPLES, deadline=None, suppress_health_check=list(HealthCheck))
@given(data=st.data())
def test_records_fit_or_fail_by_path_for_any_spec(shared_app: Flask, data: st.DataObject
                                                  ) -> None:
    spec = data.draw(model_spec(), label="spec")
    name = f"m{next(NUMBERS)}"
    client = shared_app.test_client()
    answer = post(client, "/v1/models", {"name": name, **spec})
    assert answer.status_code == 201, answer.get_json()
    path = f"/v1/models/{name}/records"

    batch = data.draw(valid_batch(spec), label="batch")
    broken, body, field = break_one(data.draw, spec, batch)
    refused = post(client, path, body)
    assert refused.status_code == 422, (refused.get_json(), broken)
    assert refused.mimetype == "application/problem+json"
    assert field in refused.get_json()["errors"], (field, refused.get_json())
    assert stored(shared_app, name) == []

    accepted = post(client, path, {"records": batch})
    assert accepted.status_code == 201, (accepted.get_json(), batch)
    assert accepted.get_json() == {"accepted": len(batch), "duplicates": 0}
    expected = [({k: float(v) if isinstance(v, int | float) and not isinstance(v, bool)
                  else v for k, v in r["features"].items()}, r["label"]) for r in batch]
    got = stored(shared_app, name)
    assert [f for f, _ in got] == [f for f, _ in expected]
    for (_, label), (_, sent) in zip(got, expected, strict=True):
        assert label == sent and type(label) is type(sent) or (
            spec["task"] == "regression" and float(label) == float(sent))
