"""GraphBuilder's contract (names, scopes, constants, opset-aware helpers, outputs) and the
standalone activations, each run in onnxruntime against NumPy/SciPy formulas from the papers."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import onnx
import pytest
from scipy import special

import keras_models as km
from seqgate.errors import Refusal
from seqgate.export.core.activations import STANDALONE_KINDS, cell_activation, emit_activation
from seqgate.export.core.builder import FLOAT, GraphBuilder
from seqgate.export.core.recurrent import CellActivation, activation_attrs


def _run(b: GraphBuilder, feeds: dict[str, np.ndarray]) -> list[np.ndarray]:
    return km.session(b.build({"seqgate.version": "test"})).run(None, feeds)


def test_names_scopes_and_doc_strings() -> None:
    b = GraphBuilder(17, "g", "keras")
    x = b.input("x", FLOAT, ["batch", 3])
    assert b.fresh("t") == "t" and b.fresh("t") == "t_1"
    with b.layer("dense_1", "Dense"):
        y = b.op("Relu", [x])
        z = b.op("Relu", [y])
    assert y == "dense_1/Relu" and z.startswith("dense_1/Relu_")  # node names share the namespace
    w = b.op("Neg", [z])
    b.output(w, "out", FLOAT, ["batch", 3])
    m = b.build({"seqgate.version": "test"})
    docs = {n.op_type + str(i): n.doc_string for i, n in enumerate(m.graph.node)}
    assert docs["Relu0"] == "keras layer 'dense_1' (Dense)"
    assert docs["Neg2"] == "seqgate glue"
    assert [r.name for r in b.layers] == ["dense_1"] and len(b.layers[0].nodes) == 2
    with pytest.raises(ValueError, match="used twice"):
        b.reserve("x")


def test_scalar_constants_stay_scalars() -> None:
    """A 0-d constant must stay 0-d: Gather with a scalar index drops the axis (ONNX spec)."""
    b = GraphBuilder(17, "g", "keras")
    x = b.input("x", FLOAT, [2, 3, 4])
    idx = b.const(np.asarray(1, np.int64), "index")
    assert list(b._inits[idx].dims) == []
    b.output(b.op("Gather", [x, idx], axis=0), "y", FLOAT, [3, 4])
    data = np.arange(24, dtype=np.float32).reshape(2, 3, 4)
    np.testing.assert_array_equal(_run(b, {"x": data})[0], data[1])


@pytest.mark.parametrize("opset", [17, 18, 23])
def test_opset_aware_helpers(opset: int) -> None:
    b = GraphBuilder(opset, "g", "keras")
    x = b.input("x", FLOAT, ["batch", "time", 3])
    outs = {
        "flip": (b.reverse_time(x, 1), ["batch", "time", 3]),
        "mean": (b.reduce("ReduceMean", x, [1], keepdims=False), ["batch", 3]),
        "sum": (b.reduce("ReduceSum", x, [2], keepdims=True), ["batch", "time", 1]),
        "max": (b.reduce("ReduceMax", x, [1], keepdims=False), ["batch", 3]),
        "prod": (b.reduce("ReduceProd", x, [0], keepdims=False), ["time", 3]),
        "sq": (b.squeeze(b.unsqueeze(x, [0]), [0]), ["batch", "time", 3]),
        "sl": (b.slice(x, [1], [3], [1]), ["batch", None, 3]),
    }
    for name, (v, dims) in outs.items():
        b.output(v, name, FLOAT, dims)
    data = np.random.default_rng(0).normal(size=(2, 5, 3)).astype(np.float32)
    got = dict(zip(outs, _run(b, {"x": data}), strict=True))
    np.testing.assert_array_equal(got["flip"], data[:, ::-1])
    np.testing.assert_allclose(got["mean"], data.mean(1), rtol=1e-6)
    np.testing.assert_allclose(got["sum"], data.sum(2, keepdims=True), rtol=1e-6, atol=1e-6)
    np.testing.assert_array_equal(got["max"], data.max(1))
    np.testing.assert_allclose(got["prod"], data.prod(0), rtol=1e-6)
    np.testing.assert_array_equal(got["sq"], data)
    np.testing.assert_array_equal(got["sl"], data[:, 1:3])


def test_output_binding_renames_or_adds_identity() -> None:
    b = GraphBuilder(17, "g", "keras")
    x = b.input("x", FLOAT, ["batch", 2])
    y = b.op("Relu", [x])
    b.output(y, "first", FLOAT, ["batch", 2])
    b.output(y, "second", FLOAT, ["batch", 2])  # same value twice → an Identity
    b.output(x, "passthrough", FLOAT, ["batch", 2])  # a graph input → an Identity
    m = b.build({})
    assert [o.name for o in m.graph.output] == ["first", "second", "passthrough"]
    assert m.graph.node[0].output[0] == "first"  # the producer was renamed, no copy
    assert [n.op_type for n in m.graph.node] == ["Relu", "Identity", "Identity"]
    data = np.array([[-1.0, 2.0]], np.float32)
    r = km.session(m).run(None, {"x": data})
    np.testing.assert_array_equal(r[0], [[0.0, 2.0]])
    np.testing.assert_array_equal(r[1], r[0])
    np.testing.assert_array_equal(r[2], data)


def test_initializers_sorted_and_build_deterministic() -> None:
    def make() -> bytes:
        b = GraphBuilder(17, "g", "keras")
        x = b.input("x", FLOAT, [1, 2])
        y = b.op("Add", [x, b.const(np.ones((1, 2), np.float32), "z_bias")])
        y = b.op("Mul", [y, b.const(np.full((1, 2), 2.0, np.float32), "a_scale")])
        b.output(y, "y", FLOAT, [1, 2])
        return b.build({"k": "v"}).SerializeToString(deterministic=True)

    m = onnx.load_from_string(make())
    names = [i.name for i in m.graph.initializer]
    assert names == sorted(names)
    assert make() == make()


def test_constants_nothing_reads_are_dropped_but_sub_graph_reads_kept() -> None:
    """A constant read by no node is not written (ONNX Runtime would warn "Removing initializer");
    one read only inside a Scan body (by its outer-scope name, ONNX IR: sub-graphs may reference
    outer values) is kept, and the model still runs: y = x + 1 for every step."""
    from onnx import helper

    b = GraphBuilder(17, "g", "keras")
    x = b.input("x", FLOAT, [3, 2])
    b.const(np.zeros((4,), np.float32), "unused")
    one = b.const(np.ones((2,), np.float32), "one")
    body = helper.make_graph(
        [helper.make_node("Add", ["xt", one], ["yt"])], "body",
        [helper.make_tensor_value_info("xt", FLOAT, [2])], [helper.make_tensor_value_info("yt", FLOAT, [2])])
    y = b.op("Scan", [x], body=body, num_scan_inputs=1)
    b.output(y, "y", FLOAT, [3, 2])
    m = b.build({"seqgate.version": "test"})
    assert [i.name for i in m.graph.initializer] == [one]
    xs = np.arange(6, dtype=np.float32).reshape(3, 2)
    np.testing.assert_array_equal(km.session(m).run(None, {"x": xs})[0], xs + 1)


# ----- standalone activations vs the formulas -------------------------------------------------
SELU_ALPHA, SELU_SCALE = 1.6732632423543772, 1.0507009873554805  # Klambauer et al. (2017), from memory


def _sigmoid(x: np.ndarray) -> np.ndarray:
    return special.expit(x)


def _softplus(x: np.ndarray) -> np.ndarray:
    return np.logaddexp(0.0, x)


FORMULAS: dict[str, tuple[dict[str, Any], Any]] = {
    "linear": ({}, lambda x: x),
    "relu": ({}, lambda x: np.maximum(x, 0)),
    "sigmoid": ({}, _sigmoid),
    "tanh": ({}, np.tanh),
    "softmax": ({"axis": -1}, lambda x: special.softmax(x, axis=-1)),
    "log_softmax": ({"axis": -1}, lambda x: special.log_softmax(x, axis=-1)),
    "softplus": ({}, _softplus),
    "softsign": ({}, lambda x: x / (1 + np.abs(x))),
    "elu": ({"alpha": 0.7}, lambda x: np.where(x > 0, x, 0.7 * np.expm1(np.minimum(x, 0)))),
    "selu": ({"alpha": SELU_ALPHA, "gamma": SELU_SCALE},
             lambda x: SELU_SCALE * np.where(x > 0, x, SELU_ALPHA * np.expm1(np.minimum(x, 0)))),
    "leaky_relu": ({"alpha": 0.2}, lambda x: np.where(x >= 0, x, 0.2 * x)),
    "exponential": ({}, np.exp),
    # Hendrycks & Gimpel (2016): exact x·Φ(x) and the tanh approximation
    "gelu": ({"approximate": False}, lambda x: 0.5 * x * (1 + special.erf(x / math.sqrt(2)))),
    "silu": ({}, lambda x: x * _sigmoid(x)),
    # Howard et al. (2019): hard-swish x·relu6(x + 3)/6
    "hard_sigmoid": ({"alpha": 1 / 6, "beta": 0.5}, lambda x: np.clip(x + 3, 0, 6) / 6),
    "hard_silu": ({"alpha": 1 / 6, "beta": 0.5}, lambda x: x * np.clip(x + 3, 0, 6) / 6),
    "relu6": ({}, lambda x: np.clip(x, 0, 6)),
    "hard_tanh": ({"min": -1.0, "max": 1.0}, lambda x: np.clip(x, -1, 1)),
    "mish": ({}, lambda x: x * np.tanh(_softplus(x))),  # Misra (2019)
    "log_sigmoid": ({}, lambda x: -_softplus(-x)),
}


def test_every_standalone_kind_has_a_formula() -> None:
    assert set(FORMULAS) == set(STANDALONE_KINDS)


@pytest.mark.parametrize("kind", sorted(FORMULAS))
def test_standalone_activation(kind: str) -> None:
    params, formula = FORMULAS[kind]
    x = np.linspace(-8, 8, 161, dtype=np.float32).reshape(7, 23)
    b = GraphBuilder(17, "g", "keras")
    v = b.input("x", FLOAT, [7, 23])
    b.output(emit_activation(b, kind, v, params), "y", FLOAT, [7, 23])
    got = _run(b, {"x": x})[0]
    np.testing.assert_allclose(got, formula(x.astype(np.float64)), rtol=1e-5, atol=1e-6)


def test_gelu_approximate_matches_keras() -> None:
    k = km.keras()
    x = np.linspace(-6, 6, 97, dtype=np.float32)
    b = GraphBuilder(17, "g", "keras")
    v = b.input("x", FLOAT, [97])
    b.output(emit_activation(b, "gelu", v, {"approximate": True}), "y", FLOAT, [97])
    got = _run(b, {"x": x})[0]
    want = np.asarray(k.activations.gelu(x, approximate=True))
    np.testing.assert_allclose(got, want, rtol=1e-5, atol=1e-6)
    t = np.tanh(math.sqrt(2 / math.pi) * (x + 0.044715 * x.astype(np.float64) ** 3))
    np.testing.assert_allclose(got, 0.5 * x * (1 + t), rtol=1e-5, atol=1e-6)


@pytest.mark.parametrize("kind", ["gelu", "silu", "selu", "relu6", "mish", "exponential"])
def test_cell_activation_refuses_inexact(kind: str) -> None:
    with pytest.raises(Refusal, match=kind):
        cell_activation(kind)


def test_activation_attrs_compact_lists() -> None:
    """Alpha/beta go only to activations that take them (onnxruntime's reading, measured)."""
    attrs = activation_attrs([CellActivation("Sigmoid"), CellActivation("LeakyRelu", 0.2),
                              CellActivation("HardSigmoid", 1 / 6, 0.5), CellActivation("Tanh")])
    assert attrs["activations"] == ["Sigmoid", "LeakyRelu", "HardSigmoid", "Tanh"]
    assert attrs["activation_alpha"] == [0.2, 1 / 6]
    assert attrs["activation_beta"] == [0.5]
    assert "activation_alpha" not in activation_attrs([CellActivation("Sigmoid"), CellActivation("Tanh")])
