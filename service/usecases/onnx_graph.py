"""A trained version as an ONNX model: the encoding and the network in one graph.

Built with the `onnx` package's helpers (onnx.helper, onnx.numpy_helper), all in
float64, from the learner a version's snapshot holds:

* one graph input per field, shape [records, 1]: a numeric field as a double, a
  boolean field as a bool, a categorical field as a string;
* the encoding inside the graph: a boolean cast to 0/1, a categorical field
  one-hot in declared level order by ai.onnx.ml OneHotEncoder (zeros=0: an
  unknown level fails the run, as the service refuses it), the columns
  concatenated in declared order, then (x - center) / scale with the
  version's frozen statistics, as engine.encoding does;
* per layer a Gemm (the weights in scikit-learn's layout, fan_in x fan_out)
  and the hidden activation (Tanh, Sigmoid or Relu);
* one output: `probabilities` [records, classes] (binary: [1 - p, p], as the
  service answers) or `value` [records, 1] in raw target units.

Names: the IR document asks for C identifiers (from memory) and a graph in
single assignment. Inputs are the field names (C identifiers already); an
inner tensor is `k{n}_{what}`, and takes leading `_`s, an output a trailing
one, while a field already has its name.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

# ai.onnx opset 21 (ONNX 1.16) with IR version 10: old enough for any
# onnxruntime of 2024 on; ai.onnx.ml opset 3 (OneHotEncoder is unchanged since 1).
OPSET = 21
ML_OPSET = 3
IR_VERSION = 10
ML_DOMAIN = "ai.onnx.ml"
_ROWS = "records"  # the symbolic batch dimension
_ACTIVATION_OP = {"tanh": "Tanh", "logistic": "Sigmoid", "relu": "Relu"}


class _Graph:
    """Nodes and initialisers being collected, with fresh inner names."""

    def __init__(self, taken: set[str]) -> None:
        self.nodes: list[onnx.NodeProto] = []
        self.initializers: list[onnx.TensorProto] = []
        self._taken = taken
        self._count = 0

    def name(self, what: str) -> str:
        self._count += 1
        name = f"k{self._count}_{what}"
        while name in self._taken:
            name = "_" + name
        return name

    def constant(self, what: str, value: np.ndarray[Any, Any]) -> str:
        name = self.name(what)
        self.initializers.append(numpy_helper.from_array(np.ascontiguousarray(value), name))
        return name

    def node(self, op: str, inputs: list[str], what: str, *, output: str | None = None,
             domain: str = "", **attributes: Any) -> str:
        out = output or self.name(what)
        self.nodes.append(helper.make_node(op, inputs, [out], name=self.name(op),
                                           domain=domain, **attributes))
        return out


def _free(name: str, taken: set[str]) -> str:
    while name in taken:
        name += "_"
    return name


def output_name(learner: Any) -> str:
    """The graph output's name for this learner."""
    base = "value" if learner.task == "regression" else "probabilities"
    return _free(base, set(learner.fields))


def onnx_model(learner: Any, model_name: str, version: int) -> onnx.ModelProto:
    """The ONNX model of a learner (engine.learner.Learner) of version `version`."""
    encoder, network, spec = learner.encoder, learner.network, learner.spec
    graph = _Graph(set(encoder.fields))
    inputs, columns = [], []
    for feature, name, kind in zip(spec["features"], encoder.fields, encoder.kinds,
                                   strict=True):
        unit = feature.get("unit")
        doc = f"{kind}" + (f", unit {unit}" if unit else "")
        if kind == "numeric":
            inputs.append(helper.make_tensor_value_info(name, TensorProto.DOUBLE,
                                                        [_ROWS, 1], doc))
            columns.append(name)
        elif kind == "boolean":
            inputs.append(helper.make_tensor_value_info(name, TensorProto.BOOL,
                                                        [_ROWS, 1], doc))
            columns.append(graph.node("Cast", [name], f"{name}_double", to=TensorProto.DOUBLE))
        else:
            levels = [str(level) for level in encoder.levels[name]]
            inputs.append(helper.make_tensor_value_info(name, TensorProto.STRING,
                                                        [_ROWS, 1], doc))
            # OneHotEncoder answers float32 [records, 1, levels]; 0 and 1 are exact.
            hot = graph.node("OneHotEncoder", [name], f"{name}_one_hot", domain=ML_DOMAIN,
                             cats_strings=levels, zeros=0)
            shape = graph.constant(f"{name}_shape", np.array([-1, len(levels)], np.int64))
            flat = graph.node("Reshape", [hot, shape], f"{name}_columns")
            columns.append(graph.node("Cast", [flat], f"{name}_double", to=TensorProto.DOUBLE))
    raw = graph.node("Concat", columns, "raw", axis=1)
    centered = graph.node("Sub", [raw, graph.constant("center", encoder.center)], "centered")
    x = graph.node("Div", [centered, graph.constant("scale", encoder.scale)], "encoded")
    last = len(network.weights) - 1
    for i, (weights, biases) in enumerate(zip(network.weights, network.biases, strict=True)):
        w = graph.constant(f"layer{i}_weights", np.array(weights))
        b = graph.constant(f"layer{i}_biases", np.array(biases))
        x = graph.node("Gemm", [x, w, b], f"layer{i}_logits")
        if i < last:
            x = graph.node(_ACTIVATION_OP[network.activation], [x], f"layer{i}_activations")
    out = output_name(learner)
    if learner.task == "binary":
        p = graph.node("Sigmoid", [x], "p1")
        one = graph.constant("one", np.array([[1.0]]))
        p0 = graph.node("Sub", [one, p], "p0")
        graph.node("Concat", [p0, p], "probabilities", output=out, axis=1)
        width = 2
    elif learner.task == "multiclass":
        graph.node("Softmax", [x], "probabilities", output=out, axis=1)
        width = len(encoder.classes)
    else:
        scaled = graph.node("Mul", [x, graph.constant(
            "target_scale", np.array([encoder.target_scale]))], "scaled")
        graph.node("Add", [scaled, graph.constant(
            "target_center", np.array([encoder.target_center]))], "value", output=out)
        width = 1
    outputs = [helper.make_tensor_value_info(out, TensorProto.DOUBLE, [_ROWS, width])]
    body = helper.make_graph(graph.nodes, f"{model_name}_v{version}", inputs, outputs,
                             graph.initializers)
    model = helper.make_model(
        body, ir_version=IR_VERSION, producer_name="keelson",
        opset_imports=[helper.make_opsetid("", OPSET), helper.make_opsetid(ML_DOMAIN, ML_OPSET)],
        doc_string=f"Keelson model {model_name}, version {version}: a {learner.task} "
                   f"network {'-'.join(map(str, network.sizes))}, {network.activation}.")
    model.model_version = int(version)
    helper.set_model_props(model, _metadata(learner, model_name, version, out))
    return model


def _metadata(learner: Any, model_name: str, version: int, out: str) -> dict[str, str]:
    spec = learner.spec
    units = {f["name"]: f["unit"] for f in spec["features"] if f.get("unit")}
    props = {
        "keelson.model": model_name,
        "keelson.version": str(version),
        "keelson.task": learner.task,
        "keelson.output": out,
        "keelson.fields": json.dumps([{"name": f["name"], "type": f["type"],
                                       **({"unit": f["unit"]} if f.get("unit") else {})}
                                      for f in spec["features"]]),
        "keelson.units": json.dumps(units),
        "keelson.opset": f"ai.onnx {OPSET}, {ML_DOMAIN} {ML_OPSET}",
    }
    if learner.task != "regression":
        props["keelson.classes"] = json.dumps(learner.classes)
    if isinstance(spec.get("target"), str):
        props["keelson.target"] = spec["target"]
    return props


def onnx_bytes(learner: Any, model_name: str, version: int) -> bytes:
    """The serialized ONNX model (what the export answers)."""
    return bytes(onnx_model(learner, model_name, version).SerializeToString())
