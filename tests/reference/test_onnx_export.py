"""GET /v1/models/{name}/versions/{n}/export?format=onnx against the ONNX standard.

Sources: the ONNX standard (onnx.ai), checked with its reference checker
(`onnx.checker.check_model(full_check=True)`: the graph is well formed and its
types and shapes infer), and run with onnxruntime, an independent
implementation of it. The graph takes raw fields and must answer what the
service answers for the same records (served over HTTP): to 1e-9 in float64,
for binary, multiclass and regression models with numeric, categorical and
boolean fields, and every hidden activation the spec allows.
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import onnxruntime
import pytest
from click.testing import CliRunner
from flask import Flask
from sklearn import datasets

from engine import Learner
from engine.spec import ACTIVATIONS
from service.tools.cli import cli
from service.usecases.onnx_graph import onnx_model
from service.web.app import create_app
from service.web.extensions import get_database
from tests.service.helpers import ADMIN_TOKEN, ApiClient, create_model
from tests.service.predictions_factory import add_version, stored_spec, train_learner

FEATURES = [
    {"name": "flow", "type": "numeric", "min": 0, "max": 50, "unit": "l/s"},
    {"name": "pump_family", "type": "categorical", "levels": ["centrifugal", "screw", "piston"]},
    {"name": "has_vfd", "type": "boolean"},
    {"name": "pressure", "type": "numeric", "min": 0, "max": 12, "unit": "bar"},
]
FAMILIES = ("centrifugal", "screw", "piston")


def rows(n: int, seed: int) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed)
    return [{"flow": float(rng.uniform(0, 50)), "pump_family": FAMILIES[int(rng.integers(3))],
             "has_vfd": bool(rng.random() < 0.5), "pressure": float(rng.uniform(0, 12))}
            for _ in range(n)]


def _score(row: Mapping[str, Any]) -> float:
    return (row["flow"] / 25 + row["pressure"] / 6 - (0.7 if row["has_vfd"] else 0.0)
            + FAMILIES.index(row["pump_family"]) * 0.4)


MODELS: dict[str, dict[str, Any]] = {
    "binary": {"classes": [False, True], "rule": lambda row: _score(row) > 1.6},
    "multiclass": {"classes": ["calm", "watch", "alarm"],
                   "rule": lambda row: ["calm", "watch", "alarm"][
                       min(2, int(_score(row) / 1.2))]},
    "regression": {"classes": None, "rule": lambda row: 3.0 * _score(row) + 40.0},
}


@pytest.fixture
def api(sqlite_url: str) -> Iterator[ApiClient]:
    app: Flask = create_app({"KEELSON_DATABASE_URL": sqlite_url,
                             "KEELSON_ADMIN_TOKEN": ADMIN_TOKEN, "TESTING": True})
    yield ApiClient(app)
    get_database(app).engine.dispose()


def serve(api: ApiClient, task: str, activation: str) -> str:
    """Create the model over HTTP and store a version trained on its rule."""
    model = MODELS[task]
    name = f"station-{task}-{activation}"
    create_model(api, name=name, task=task, target="state", classes=model["classes"],
                 features=FEATURES, activation=activation, hidden_layers=[10, 6])
    learner = train_learner(stored_spec(api.app, name), rows(300, seed=1), model["rule"],
                            passes=3)
    add_version(api.app, name, learner.to_bytes())
    return name


def exported(api: ApiClient, name: str, number: int = 1) -> bytes:
    response = api.client.get(f"/v1/models/{name}/versions/{number}/export?format=onnx",
                              headers={"Authorization": f"Bearer {ADMIN_TOKEN}"})
    assert response.status_code == 200, response.get_data(True)
    assert response.mimetype == "application/octet-stream"
    assert f'filename="{name}-v{number}.onnx"' in response.headers["Content-Disposition"]
    return response.data


def feeds(records: list[dict[str, Any]]) -> dict[str, np.ndarray[Any, Any]]:
    """One [n, 1] array per field: doubles, booleans, strings (objects)."""
    columns: dict[str, np.ndarray[Any, Any]] = {}
    for feature in FEATURES:
        values = [r[feature["name"]] for r in records]
        dtype = {"numeric": np.float64, "boolean": np.bool_, "categorical": object}[
            feature["type"]]
        columns[feature["name"]] = np.array(values, dtype=dtype).reshape(-1, 1)
    return columns


def served(api: ApiClient, name: str, task: str, records: list[dict[str, Any]]) -> np.ndarray:
    body = api.request("POST", f"/v1/models/{name}/predictions", 200,
                       json_body={"records": [{"features": r} for r in records],
                                  "explain": "none"})
    results = [answer["result"] for answer in body["results"]]
    if task == "regression":
        return np.array([[result["value"]] for result in results])
    keys = [str(c).lower() if isinstance(c, bool) else str(c) for c in MODELS[task]["classes"]]
    return np.array([[result["probabilities"][k] for k in keys] for result in results])


def session(model: bytes) -> onnxruntime.InferenceSession:
    return onnxruntime.InferenceSession(model, providers=["CPUExecutionProvider"])


@pytest.mark.parametrize("activation", ACTIVATIONS)
@pytest.mark.parametrize("task", list(MODELS))
def test_onnxruntime_answers_what_the_service_answers(
    api: ApiClient, task: str, activation: str
) -> None:
    name = serve(api, task, activation)
    data = exported(api, name)
    model = onnx.load_from_string(data)
    onnx.checker.check_model(model, full_check=True)  # the ONNX standard's own checker
    records = rows(64, seed=7)
    run = session(data)
    assert [i.name for i in run.get_inputs()] == [f["name"] for f in FEATURES]
    assert [i.type for i in run.get_inputs()] == [
        "tensor(double)", "tensor(string)", "tensor(bool)", "tensor(double)"]
    output = "value" if task == "regression" else "probabilities"
    assert [o.name for o in run.get_outputs()] == [output]
    (got,) = run.run(None, feeds(records))
    assert got.dtype == np.float64
    want = served(api, name, task, records)
    assert got.shape == want.shape
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-9)


def test_the_metadata_names_the_model_version_opset_and_units(api: ApiClient) -> None:
    name = serve(api, "binary", "tanh")
    model = onnx.load_from_string(exported(api, name))
    props = {p.key: p.value for p in model.metadata_props}
    assert props["keelson.model"] == name and props["keelson.version"] == "1"
    assert model.model_version == 1 and model.producer_name == "keelson"
    assert {(o.domain, o.version) for o in model.opset_import} == {("", 21), ("ai.onnx.ml", 3)}
    assert props["keelson.units"] == '{"flow": "l/s", "pressure": "bar"}'
    assert props["keelson.classes"] == "[false, true]"
    docs = {i.name: i.doc_string for i in model.graph.input}
    assert docs["flow"] == "numeric, unit l/s" and docs["has_vfd"] == "boolean"


def test_an_unknown_level_is_refused_by_both(api: ApiClient) -> None:
    """The service answers 422 for a level the spec does not declare; the graph's
    OneHotEncoder (zeros=0) fails the run: neither scores the record."""
    name = serve(api, "binary", "relu")
    record = {**rows(1, seed=3)[0], "pump_family": "diaphragm"}
    api.request("POST", f"/v1/models/{name}/predictions", 422,
                json_body={"records": [{"features": record}]})
    with pytest.raises(Exception, match="diaphragm|category|Category"):
        session(exported(api, name)).run(None, feeds([record]))


def test_refusals(api: ApiClient) -> None:
    name = serve(api, "regression", "tanh")
    base = f"/v1/models/{name}/versions"
    api.request("GET", f"{base}/2/export?format=onnx", 404)
    api.request("GET", "/v1/models/no-such-model/versions/1/export?format=onnx", 404)
    api.request("GET", f"{base}/1/export?format=pmml", 422)
    api.request("GET", f"{base}/1/export", 422)
    api.request("GET", f"{base}/1/export?format=onnx&extra=1", 422)
    predict = api.token("predict", "ingest", name="scada")
    api.request("GET", f"{base}/1/export?format=onnx", 403, token=predict)
    api.request("GET", f"{base}/1/export?format=onnx", 401, token=None)


def test_the_command_writes_the_same_file(api: ApiClient, sqlite_url: str,
                                          tmp_path: Path) -> None:
    name = serve(api, "multiclass", "logistic")
    target = tmp_path / "station.onnx"
    env = {"KEELSON_DATABASE_URL": sqlite_url}
    result = CliRunner().invoke(cli, ["export-version", name, "1", str(target)], env=env)
    assert result.exit_code == 0, result.output
    assert target.read_bytes() == exported(api, name)
    missing = CliRunner().invoke(cli, ["export-version", name, "9", str(tmp_path / "x.onnx")],
                                 env=env)
    assert missing.exit_code == 1 and "has no version 9" in missing.output
    assert not (tmp_path / "x.onnx").exists()


def test_a_name_a_field_holds_is_not_reused_inside() -> None:
    """A graph is in single assignment (the ONNX checker refuses a name defined
    twice): the output and the inner tensors step aside from the field names
    `value` and `k1_raw` (what the output and the first inner tensor are called)."""
    spec = {"task": "regression", "target": "head_m",
            "features": [{"name": "value", "type": "numeric", "min": 0, "max": 5},
                         {"name": "k1_raw", "type": "numeric", "min": 0, "max": 9}]}
    learner = Learner.create(spec)
    model = onnx_model(learner, "station-head", 1)
    onnx.checker.check_model(model, full_check=True)
    assert [o.name for o in model.graph.output] == ["value_"]
    assert model.graph.node[0].output == ["_k1_raw"]
    record = {"value": 2.5, "k1_raw": 4.0}
    (got,) = session(model.SerializeToString()).run(
        None, {name: np.array([[v]]) for name, v in record.items()})
    np.testing.assert_allclose(got, learner.predict(learner.encode([record])),
                               rtol=0, atol=1e-12)


@pytest.mark.parametrize("dataset", ["wine", "breast_cancer", "diabetes"])
def test_bundled_datasets_online_and_retrain_versions(api: ApiClient, dataset: str) -> None:
    """scikit-learn's bundled Wine (Forina et al., UCI), Breast Cancer Wisconsin
    (Street, Wolberg & Mangasarian 1993) and Diabetes (Efron et al. 2004): a
    version learnt online and one from a batch fit (a retrain's kind), each
    exported and run by onnxruntime, answer what the service serves."""
    loaded = getattr(datasets, f"load_{dataset}")()
    names = [re.sub(r"\W", "_", str(n)) for n in loaded.feature_names]
    task = {"wine": "multiclass", "breast_cancer": "binary", "diabetes": "regression"}[dataset]
    classes = None if task == "regression" else [int(c) for c in np.unique(loaded.target)]
    records = [dict(zip(names, map(float, x), strict=True)) for x in loaded.data]
    labels = [float(t) if task == "regression" else int(t) for t in loaded.target]
    name = f"station-{dataset.replace('_', '-')}"
    create_model(api, name=name, task=task, target="y", classes=classes, hidden_layers=[16, 8],
                 features=[{"name": n, "type": "numeric"} for n in names])
    spec = stored_spec(api.app, name)
    learner = Learner.create(spec, warmup=records[:256], warmup_labels=labels[:256])
    X, Y = learner.encode(records), learner.encode_labels(labels)
    learner.learn(X, Y)
    add_version(api.app, name, learner.to_bytes())
    learner.fit(X, Y)
    add_version(api.app, name, learner.to_bytes())
    feed = {n: np.array([[r[n]] for r in records]) for n in names}
    for number in (1, 2):
        data = exported(api, name, number)
        onnx.checker.check_model(onnx.load_from_string(data), full_check=True)
        (got,) = session(data).run(None, feed)
        body = api.request("POST", f"/v1/models/{name}/predictions", 200, json_body={
            "records": [{"features": r} for r in records], "explain": "none",
            "version": number})
        results = [answer["result"] for answer in body["results"]]
        want = np.array([[r["value"]] for r in results] if task == "regression" else
                        [[r["probabilities"][str(c)] for c in classes or ()] for r in results])
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-9)
