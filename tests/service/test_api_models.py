"""POST/GET /v1/models: whole bodies, database state, and the spec rules."""

from __future__ import annotations

from http import HTTPStatus
from typing import Any

import pytest
from flask import Flask
from sqlalchemy import select

from service.store.tables import ModelRow, TrainerRow
from service.web.extensions import get_database
from tests.service.helpers import ApiClient, create_model, model_row, model_spec

FULL_TRAINING = {
    "optimizer": "sgd", "learning_rate": 0.01, "momentum": 0.9, "nesterov": False,
    "l2": 0.0001, "clip_norm": 5.0, "lr_schedule": "constant", "decay_exponent": 0.5,
    "batch_size": 64, "max_epochs": 200, "patience": 10, "validation_fraction": 0.1,
    "seed": 0, "warmup_records": 256, "holdout_fraction": 0.2, "checkpoint_every": 1000,
}


def expected_model(**overrides: Any) -> dict[str, Any]:
    """The answer for the pump spec: engine/spec.py's defaults filled in."""
    body = {
        **model_spec(),
        "hidden_layers": [32, 16],
        "activation": "tanh",
        "loss": "cross_entropy",
        "promotion": "auto",
        "training": FULL_TRAINING,
        # The change alarm's binary defaults (engine.spec.ALARM_DEFAULTS).
        "alarm": {"delta": 0.01, "threshold": 20.0},
        "active_version": None,
        "records": {"total": 0, "train": 0, "holdout": 0},
        "trainer": {"cursor": 0, "lag": 0, "paused": False},
    }
    body.update(overrides)
    return body


def without_time(body: dict[str, Any]) -> dict[str, Any]:
    assert body.pop("created_at").endswith("+00:00")
    return body


def test_creating_a_model_answers_the_stored_model_and_starts_its_trainer(
    any_api: ApiClient, any_app: Flask
) -> None:
    body = create_model(any_api)
    assert without_time(body) == expected_model()
    with get_database(any_app).read() as session:
        row = session.scalars(select(ModelRow)).one()
        trainer = session.get(TrainerRow, row.id)
    assert row.name == "pump-risk" and row.active_version_id is None
    assert row.spec["training"] == FULL_TRAINING
    assert trainer is not None and trainer.cursor == 0


def test_a_model_is_shown_and_listed_as_created(any_api: ApiClient) -> None:
    created = create_model(any_api)
    create_model(any_api, name="aa-first")
    shown = any_api.request("GET", "/v1/models/pump-risk", 200)
    assert shown == created
    listed = any_api.request("GET", "/v1/models", 200)
    assert [m["name"] for m in listed["models"]] == ["aa-first", "pump-risk"]
    assert listed["models"][1] == created


def test_an_empty_list_when_there_are_no_models(api: ApiClient) -> None:
    assert api.request("GET", "/v1/models", 200) == {"models": [], "next": None}


def test_a_duplicate_name_is_a_conflict(any_api: ApiClient, any_app: Flask) -> None:
    create_model(any_api)
    body = any_api.request("POST", "/v1/models", 409, json_body=model_spec())
    assert body == {
        "type": "about:blank", "title": "Conflict", "status": 409,
        "detail": "A model named 'pump-risk' already exists.",
    }
    with get_database(any_app).read() as session:
        assert len(session.scalars(select(ModelRow)).all()) == 1


def test_binary_classes_default_to_false_and_true(api: ApiClient) -> None:
    spec = model_spec()
    del spec["classes"]
    body = api.request("POST", "/v1/models", 201, json_body=spec)
    assert body["classes"] == [False, True]


def test_regression_and_multiclass_specs_are_stored(api: ApiClient, app: Flask) -> None:
    body = create_model(api, name="flow", task="regression", classes=None,
                        training={"optimizer": "adam", "holdout_fraction": 0.25})
    assert body["classes"] is None and body["loss"] == "squared_error"
    assert body["training"] == {**FULL_TRAINING, "optimizer": "adam", "holdout_fraction": 0.25}
    body = create_model(api, name="kind", task="multiclass", classes=["a", "b", "c"],
                        hidden_layers=[8], activation="relu", promotion="manual")
    assert (body["classes"], body["hidden_layers"], body["activation"], body["promotion"]) == (
        ["a", "b", "c"], [8], "relu", "manual")
    assert model_row(app, "kind").spec["classes"] == ["a", "b", "c"]


# Each bad spec: (overrides, the field path the problem must name).
BAD_SPECS = [
    ({"name": "Pump"}, "name"),
    ({"name": "-pump"}, "name"),
    ({"name": "a" * 65}, "name"),
    ({"name": "../etc"}, "name"),
    ({"task": "ranking"}, "task"),
    ({"task": "multiclass", "classes": None}, "classes"),
    ({"classes": ["a", "b", "c"]}, "classes"),
    ({"classes": ["a", "a"]}, "classes"),
    ({"classes": ["a", 1]}, "classes"),
    ({"target": ""}, "target"),
    ({"target": "vibration_rms"}, "target"),
    ({"features": []}, "features"),
    ({"features": [{"name": "x", "type": "text"}]}, "features.0.type"),
    ({"features": [{"name": "x", "type": "categorical"}]}, "features.0.levels"),
    ({"features": [{"name": "x", "type": "categorical", "levels": ["a", "a"]}]},
     "features.0.levels"),
    ({"features": [{"name": "x", "type": "numeric", "levels": ["a"]}]}, "features.0.levels"),
    ({"features": [{"name": "x", "type": "numeric", "min": 5, "max": 1}]}, "features.0.max"),
    ({"features": [{"name": "x", "type": "numeric", "min": "0"}]}, "features.0.min"),
    ({"features": [{"name": "x", "type": "boolean", "colour": "red"}]}, "features.0.colour"),
    ({"features": [{"name": "version", "type": "boolean"}]}, "features.0.name"),
    ({"features": [{"name": "a.b", "type": "boolean"}]}, "features.0.name"),
    ({"features": [{"name": "x", "type": "boolean"}, {"name": "x", "type": "boolean"}]},
     "features"),
    ({"hidden_layers": [0]}, "hidden_layers.0"),
    ({"hidden_layers": [True]}, "hidden_layers.0"),
    ({"activation": "softsign"}, "activation"),
    ({"promotion": "sometimes"}, "promotion"),
    ({"training": {"learning_rate": 0}}, "training.learning_rate"),
    ({"training": {"holdout_fraction": 1.5}}, "training.holdout_fraction"),
    ({"training": {"batch_size": 2.5}}, "training.batch_size"),
    ({"training": {"epochs": 5}}, "training.epochs"),
    ({"alarm": {"threshold": 0}}, "alarm.threshold"),
    ({"alarm": {"delta": -0.5}}, "alarm.delta"),
    ({"alarm": {"delta": "small"}}, "alarm.delta"),
    ({"alarm": {"window": 7}}, "alarm.window"),
    ({"alarm": [0.1, 5]}, "alarm"),
    ({"colour": "red"}, "colour"),
    ({"name": None}, "name"),
]


@pytest.mark.parametrize(("overrides", "field"), BAD_SPECS)
def test_a_bad_spec_is_refused_naming_the_field(
    api: ApiClient, app: Flask, overrides: dict[str, Any], field: str
) -> None:
    body = api.request("POST", "/v1/models", 422, json_body=model_spec(**overrides))
    assert body["status"] == 422 and body["title"] == HTTPStatus(422).phrase
    assert field in body["errors"], body["errors"]
    with get_database(app).read() as session:
        assert session.scalars(select(ModelRow)).all() == []


def test_a_missing_required_field_is_named(api: ApiClient) -> None:
    body = api.request("POST", "/v1/models", 422, json_body={"name": "x"})
    assert body["errors"] == {
        "task": ["Missing data for required field."],
        "target": ["Missing data for required field."],
        "features": ["Missing data for required field."],
    }


@pytest.mark.parametrize("name", ["Pump-Risk", "..", "a" * 65, "pump_risk", "%2e%2e", "-x"])
def test_an_impossible_model_name_in_the_path_is_not_found(api: ApiClient, name: str) -> None:
    body = api.request("GET", f"/v1/models/{name}", 404)
    assert body["status"] == 404 and body["type"] == "about:blank"


def test_an_unknown_model_is_not_found(api: ApiClient) -> None:
    body = api.request("GET", "/v1/models/no-such", 404)
    assert body == {"type": "about:blank", "title": "Not Found", "status": 404,
                    "detail": "There is no model named 'no-such'."}


def test_feature_names_cannot_shadow_prediction_query_parameters() -> None:
    # GET predictions reads features and options from one query string.
    from service.web.schemas.predictions import PredictionQuerySchema
    from service.web.schemas.spec import RESERVED_FIELD_NAMES

    assert set(PredictionQuerySchema().fields) <= RESERVED_FIELD_NAMES


def test_the_decay_schedule_is_spelled_with_our_own_names(api: ApiClient) -> None:
    training = {"lr_schedule": "inverse_power", "decay_exponent": 0.25}
    body = create_model(api, training=training)
    assert body["training"] == {**FULL_TRAINING, **training}


@pytest.mark.parametrize(("training", "field", "message"), [
    ({"power_t": 0.5}, "training.power_t", "Spelled decay_exponent now."),
    ({"lr_schedule": "invscaling"}, "training.lr_schedule", "Spelled 'inverse_power' now."),
])
def test_the_old_spelling_of_the_decay_schedule_is_refused_naming_the_field(
    api: ApiClient, app: Flask, training: dict[str, Any], field: str, message: str
) -> None:
    body = api.request("POST", "/v1/models", 422, json_body=model_spec(training=training))
    assert body["errors"] == {field: [message]}
    with get_database(app).read() as session:
        assert session.scalars(select(ModelRow)).first() is None


def test_the_alarm_section_is_optional_and_filled_with_the_task_defaults(
        api: ApiClient) -> None:
    body = create_model(api, task="regression", classes=None, alarm={"threshold": 80})
    # Regression's delta default (engine.spec.ALARM_DEFAULTS) beside the threshold given.
    assert body["alarm"] == {"delta": 0.1, "threshold": 80}
    assert api.request("GET", "/v1/models/pump-risk", 200)["alarm"] == body["alarm"]
