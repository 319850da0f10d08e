"""POST /v1/models refuses a model larger than the settings allow (422 naming
each field and its limit), before storing anything; within the limits it is
created as before. The limits are our own contract (docs/http-api.md,
"Models"), no outside source."""

from __future__ import annotations

import json
import time
from collections.abc import Iterator
from typing import Any

import pytest
from flask import Flask
from sqlalchemy import func, select

import engine
from engine.sizes import min_checkpoint_every, parameter_count, snapshot_bytes
from service.store.tables import ModelRow
from service.web.extensions import get_database
from tests.service.conftest import build_app
from tests.service.helpers import ApiClient, model_spec

TOO_LARGE = "The model is larger than this server allows."


def numeric(count: int) -> list[dict[str, Any]]:
    return [{"name": f"sensor_{i}", "type": "numeric"} for i in range(count)]


def categorical(count: int, levels: int) -> list[dict[str, Any]]:
    return [{"name": f"station_{i}", "type": "categorical",
             "levels": [f"pump-{j}" for j in range(levels)]} for i in range(count)]


def stored_models(app: Flask) -> int:
    with get_database(app).read() as session:
        return int(session.scalar(select(func.count()).select_from(ModelRow)) or 0)


@pytest.fixture
def roomy_app(database_url: str) -> Iterator[Flask]:
    """Spec bytes up to the body limit, so the limits on its contents are reached."""
    application = build_app(database_url, KEELSON_MAX_SPEC_BYTES=16 * 1024 * 1024)
    yield application
    get_database(application).engine.dispose()


def test_the_reported_spec_is_refused_quickly_for_its_bytes(
        any_api: ApiClient, any_app: Flask) -> None:
    # The reproduction: 1,000 fields of 1,000 levels, 8 x 4,096 hidden units.
    spec = model_spec(features=categorical(1000, 1000), hidden_layers=[4096] * 8)
    size = len(json.dumps(spec).encode())
    began = time.monotonic()
    body = any_api.request("POST", "/v1/models", 422, json_body=spec)
    assert time.monotonic() - began < 1.0
    assert body["detail"] == TOO_LARGE
    assert body["errors"] == {"body": [
        f"The spec is {size:,} bytes; at most 65,536 (KEELSON_MAX_SPEC_BYTES)."]}
    assert stored_models(any_app) == 0


def test_too_many_features_levels_and_classes_are_each_named_with_their_limit(
        roomy_app: Flask) -> None:
    api = ApiClient(roomy_app)
    spec = model_spec(task="multiclass", classes=[f"grade-{k}" for k in range(101)],
                      features=[*categorical(1, 257), *numeric(256)])
    body = api.request("POST", "/v1/models", 422, json_body=spec)
    assert body["detail"] == TOO_LARGE
    assert body["errors"] == {
        "features": ["257 features; at most 256 (KEELSON_MAX_FEATURES)."],
        "features.0.levels": ["257 levels; at most 256 (KEELSON_MAX_LEVELS)."],
        "classes": ["101 classes; at most 100 (KEELSON_MAX_CLASSES)."],
    }
    assert stored_models(roomy_app) == 0


def test_at_the_limits_a_model_is_created(roomy_app: Flask) -> None:
    api = ApiClient(roomy_app)
    spec = model_spec(task="multiclass", classes=[f"grade-{k}" for k in range(100)],
                      features=[*categorical(1, 256), *numeric(255)], hidden_layers=[8])
    created = api.request("POST", "/v1/models", 201, json_body=spec)
    assert len(created["features"]) == 256 and len(created["classes"]) == 100


def test_a_network_over_the_parameter_limit_is_refused_with_its_count(
        any_api: ApiClient, any_app: Flask) -> None:
    # 20 inputs, 1,024 and 1,024 hidden units, one output: by the layout rule
    # (inputs + bias) x outputs per layer.
    count = (20 + 1) * 1024 + (1024 + 1) * 1024 + (1024 + 1) * 1
    spec = model_spec(features=numeric(20), hidden_layers=[1024, 1024])
    body = any_api.request("POST", "/v1/models", 422, json_body=spec)
    assert body["errors"] == {"hidden_layers": [
        f"This network has {count:,} parameters (weights and biases); at most 1,000,000 "
        "(KEELSON_MAX_PARAMETERS)."]}
    assert stored_models(any_app) == 0


def test_checkpoint_every_below_the_byte_floor_states_the_smallest_allowed(
        any_api: ApiClient) -> None:
    spec = model_spec(features=numeric(20), hidden_layers=[512, 512],
                      training={"checkpoint_every": 1})
    full = engine.apply_defaults(spec)
    smallest = min_checkpoint_every(full, 65_536)
    # About 270,000 parameters and their velocity: some 4 MB a version.
    assert parameter_count(full) > 250_000 and smallest > 50
    body = any_api.request("POST", "/v1/models", 422, json_body=spec)
    assert body["errors"] == {"training.checkpoint_every": [
        f"A version of this network takes up to {snapshot_bytes(full):,} bytes; to write at "
        "most 65,536 bytes per record (KEELSON_MAX_VERSION_BYTES_PER_RECORD), "
        f"checkpoint_every must be at least {smallest:,}."]}
    spec["training"]["checkpoint_every"] = smallest - 1
    any_api.request("POST", "/v1/models", 422, json_body=spec)
    spec["training"]["checkpoint_every"] = smallest
    created = any_api.request("POST", "/v1/models", 201, json_body=spec)
    assert created["training"]["checkpoint_every"] == smallest


def test_the_default_spacing_fits_the_largest_network_the_defaults_allow(
        any_api: ApiClient) -> None:
    # Just under a million parameters with Adam (three vectors a version).
    spec = model_spec(features=numeric(30), hidden_layers=[960, 960],
                      training={"optimizer": "adam"})
    assert 900_000 < parameter_count(engine.apply_defaults(spec)) <= 1_000_000
    created = any_api.request("POST", "/v1/models", 201, json_body=spec)
    assert created["training"]["checkpoint_every"] == engine.TRAINING_DEFAULTS[
        "checkpoint_every"]


def test_the_limits_are_settings_and_the_document_states_them(sqlite_url: str) -> None:
    app = build_app(sqlite_url, KEELSON_MAX_FEATURES=2, KEELSON_MAX_LEVELS=3,
                    KEELSON_MAX_CLASSES=4, KEELSON_MAX_SPEC_BYTES=2048,
                    KEELSON_MAX_PARAMETERS=50, KEELSON_MAX_VERSION_BYTES_PER_RECORD=1024)
    try:
        api = ApiClient(app)
        body = api.request("POST", "/v1/models", 422, json_body=model_spec())
        assert body["errors"] == {"features": ["3 features; at most 2 (KEELSON_MAX_FEATURES)."]}
        small = model_spec(task="regression", classes=None, features=numeric(2),
                           hidden_layers=[16])
        body = api.request("POST", "/v1/models", 422, json_body=small)
        assert list(body["errors"]) == ["hidden_layers"]
        assert "at most 50 (KEELSON_MAX_PARAMETERS)" in body["errors"]["hidden_layers"][0]
        body = api.request("POST", "/v1/models", 422,
                           json_body=model_spec(features=numeric(300)))
        assert "at most 2,048 (KEELSON_MAX_SPEC_BYTES)" in body["errors"]["body"][0]
        small.update(hidden_layers=[4], training={"checkpoint_every": 1})
        body = api.request("POST", "/v1/models", 422, json_body=small)
        assert list(body["errors"]) == ["training.checkpoint_every"]
        schemas = api.request("GET", "/openapi.json", 200)["components"]["schemas"]
        assert schemas["ModelSpec"]["properties"]["features"]["maxItems"] == 2
        assert schemas["ModelSpec"]["properties"]["classes"]["maxItems"] == 4
        assert schemas["Feature"]["properties"]["levels"]["maxItems"] == 3
    finally:
        get_database(app).engine.dispose()
