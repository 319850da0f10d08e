"""The model spec: defaults table, validation, hash."""

from __future__ import annotations

import copy

import pytest

from engine.errors import InvalidInputError
from engine.spec import apply_defaults, spec_hash, upgrade_legacy_spec


def _spec(**overrides):
    spec = {"name": "pump-risk", "task": "binary", "target": "failed",
            "features": [{"name": "flow", "type": "numeric", "min": 0, "max": 50},
                         {"name": "family", "type": "categorical",
                          "levels": ["centrifugal", "screw"]},
                         {"name": "vfd", "type": "boolean"}]}
    spec.update(overrides)
    return spec


def test_defaults_fill_every_key_of_the_table_in_developers_md():
    full = apply_defaults(_spec())
    assert full["classes"] == [False, True]
    assert full["hidden_layers"] == [32, 16]
    assert full["activation"] == "tanh" and full["loss"] == "cross_entropy"
    assert full["promotion"] == "auto"
    assert full["training"] == {
        "optimizer": "sgd", "learning_rate": 0.01, "momentum": 0.9, "nesterov": False,
        "l2": 0.0001, "clip_norm": 5.0, "lr_schedule": "constant", "decay_exponent": 0.5,
        "batch_size": 64, "max_epochs": 200, "patience": 10, "validation_fraction": 0.1,
        "seed": 0, "warmup_records": 256, "holdout_fraction": 0.2, "checkpoint_every": 1000}


def test_defaults_do_not_touch_the_input_and_keep_given_values():
    spec = _spec(training={"learning_rate": 0.1, "clip_norm": None}, hidden_layers=[])
    before = copy.deepcopy(spec)
    full = apply_defaults(spec)
    assert spec == before
    assert full["training"]["learning_rate"] == 0.1 and full["training"]["clip_norm"] is None
    assert full["hidden_layers"] == []
    assert apply_defaults(full) == full


def test_each_task_gets_its_only_loss():
    assert apply_defaults(_spec(task="regression"))["loss"] == "squared_error"
    assert apply_defaults(_spec(task="multiclass", classes=["a", "b", "c"]))["loss"] == \
        "cross_entropy"
    assert apply_defaults(_spec(loss="squared_error"))["loss"] == "squared_error"


@pytest.mark.parametrize(("overrides", "field"), [
    ({"task": "ranking"}, "task"),
    ({"task": "multiclass"}, "classes"),
    ({"classes": ["a", "b", "c"]}, "classes"),
    ({"classes": ["a", "a"]}, "classes"),
    ({"classes": [True, 1]}, "classes"),
    ({"features": []}, "features"),
    ({"features": [{"name": "x", "type": "text"}]}, "features.0.type"),
    ({"features": [{"name": "x", "type": "numeric"}, {"name": "x", "type": "boolean"}]},
     "features.1.name"),
    ({"features": [{"name": "x", "type": "categorical", "levels": []}]}, "features.0.levels"),
    ({"features": [{"name": "x", "type": "numeric", "min": 3, "max": 1}]}, "features.0.max"),
    ({"features": [{"name": "x", "type": "numeric", "min": float("nan")}]}, "features.0.min"),
    ({"hidden_layers": [4, 0]}, "hidden_layers"),
    ({"hidden_layers": [True]}, "hidden_layers"),
    ({"activation": "softplus"}, "activation"),
    ({"task": "regression", "loss": "cross_entropy"}, "loss"),
    ({"training": {"optimizer": "rmsprop"}}, "training.optimizer"),
    ({"training": {"learning_rate": 0}}, "training.learning_rate"),
    ({"training": {"learning_rate": float("inf")}}, "training.learning_rate"),
    ({"training": {"momentum": 1.0}}, "training.momentum"),
    ({"training": {"clip_norm": -1}}, "training.clip_norm"),
    ({"training": {"batch_size": 0}}, "training.batch_size"),
    ({"training": {"seed": -1}}, "training.seed"),
    ({"training": {"validation_fraction": 1.0}}, "training.validation_fraction"),
    ({"training": {"nesterov": 1}}, "training.nesterov"),
])
def test_invalid_specs_name_the_offending_field(overrides, field):
    with pytest.raises(InvalidInputError) as caught:
        apply_defaults(_spec(**overrides))
    assert caught.value.field == field


def test_hash_depends_on_shape_not_on_training_settings_or_names():
    base = spec_hash(_spec())
    assert base == spec_hash(apply_defaults(_spec()))
    assert base == spec_hash(_spec(name="other", training={"learning_rate": 0.5}))
    assert base != spec_hash(_spec(hidden_layers=[8]))
    assert base != spec_hash(_spec(activation="relu"))
    changed = _spec()
    changed["features"][2]["name"] = "vfd2"
    assert base != spec_hash(changed)
    assert len(base) == 64


def test_the_old_schedule_spelling_is_refused_naming_the_field():
    with pytest.raises(InvalidInputError) as caught:
        apply_defaults(_spec(training={"power_t": 0.5}))
    assert caught.value.field == "training.power_t"
    assert "decay_exponent" in str(caught.value)
    with pytest.raises(InvalidInputError) as caught:
        apply_defaults(_spec(training={"lr_schedule": "invscaling"}))
    assert caught.value.field == "training.lr_schedule"


@pytest.mark.parametrize(("training", "upgraded"), [
    ({"lr_schedule": "invscaling", "power_t": 0.25},
     {"lr_schedule": "inverse_power", "decay_exponent": 0.25}),
    ({"power_t": 0.3}, {"decay_exponent": 0.3}),
    ({"lr_schedule": "invscaling"}, {"lr_schedule": "inverse_power"}),
    ({"lr_schedule": "constant", "decay_exponent": 0.5},
     {"lr_schedule": "constant", "decay_exponent": 0.5}),
    ({}, {}),
])
def test_the_old_spelling_is_translated_into_the_same_settings(training, upgraded):
    old = _spec(training=training)
    before = copy.deepcopy(old)
    new = upgrade_legacy_spec(old)
    assert old == before  # a copy: the stored mapping is left alone
    assert new == _spec(training=upgraded)
    assert upgrade_legacy_spec(new) == new
    assert apply_defaults(new)["training"]["decay_exponent"] == upgraded.get("decay_exponent",
                                                                             0.5)


def test_a_spec_without_training_is_upgraded_unchanged():
    assert upgrade_legacy_spec(_spec()) == _spec()
