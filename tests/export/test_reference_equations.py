"""The NumPy oracles of ``reference_equations`` against three outside computations.

1. onnxruntime running single hand-built RNN/GRU/LSTM nodes (onnx.helper, no seqgate code)
   with every attribute the oracle models: directions, initial states, peepholes, clip,
   input_forget, linear_before_reset, sequence_lens, parameterised activations.
2. Keras layers (the papers' equations as Keras implements them), through the oracle's own
   Keras → ONNX weight conversion.
3. The graphs seqgate exports, and the ``onnx.reference`` evaluator where it models the
   attributes (default activations only, FACTS.md).

Plus a hand-worked example with closed-form values.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import onnx
import pytest
from onnx import helper

import keras_models as km
import reference_equations as ref

pytestmark = pytest.mark.filterwarnings("ignore:__array__ implementation:DeprecationWarning")

Array = np.ndarray[Any, Any]
GATES = {"RNN": 1, "GRU": 3, "LSTM": 4}
ORACLE = {"RNN": ref.onnx_rnn, "GRU": ref.onnx_gru, "LSTM": ref.onnx_lstm}
# float64 oracle vs float32 runtime, O(1) values, T ≤ 20: a few float32 ulps per step.
TIGHT = 2e-5


def _run_node(op: str, feeds: dict[str, Array], attrs: dict[str, Any], n_out: int) -> list[Array]:
    """One ONNX recurrent node built with onnx.helper, run by onnxruntime (opset 17)."""
    order = ["X", "W", "R", "B", "sequence_lens", "initial_h", "initial_c", "P"]
    ins = [n if n in feeds else "" for n in order]
    while ins and ins[-1] == "":
        ins.pop()
    outs = ["Y", "Y_h", "Y_c"][:n_out]
    node = helper.make_node(op, ins, outs, **attrs)
    graph_inputs = [helper.make_tensor_value_info(n, helper.np_dtype_to_tensor_dtype(v.dtype), list(v.shape))
                    for n, v in feeds.items()]
    graph = helper.make_graph([node], "one", graph_inputs,
                              [helper.make_tensor_value_info(o, onnx.TensorProto.FLOAT, None) for o in outs])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    return km.session(model).run(None, feeds)


def _random_op_inputs(op: str, rng: np.random.Generator, D: int, T: int = 5, N: int = 3, I: int = 4,  # noqa: E741
                      H: int = 3) -> dict[str, Array]:
    G = GATES[op]
    f = np.float32
    return {
        "X": rng.normal(size=(T, N, I)).astype(f),
        "W": rng.normal(0, 0.6, size=(D, G * H, I)).astype(f),
        "R": rng.normal(0, 0.6, size=(D, G * H, H)).astype(f),
        "B": rng.normal(0, 0.5, size=(D, 2 * G * H)).astype(f),
        "initial_h": rng.normal(size=(D, N, H)).astype(f),
        **({"initial_c": rng.normal(size=(D, N, H)).astype(f)} if op == "LSTM" else {}),
    }


DIRS = {"forward": 1, "reverse": 1, "bidirectional": 2}

# (op, direction, extra attributes, activations) — activations as ONNX attributes
NODE_CASES = [
    ("RNN", "forward", {}, None),
    ("RNN", "reverse", {}, ["Relu"]),
    ("RNN", "bidirectional", {}, ["LeakyRelu", "Affine"]),
    ("GRU", "forward", {"linear_before_reset": 0}, None),
    ("GRU", "reverse", {"linear_before_reset": 1}, None),
    ("GRU", "bidirectional", {"linear_before_reset": 1}, ["HardSigmoid", "Elu", "Sigmoid", "Softsign"]),
    ("GRU", "forward", {"linear_before_reset": 0, "clip": 0.7}, None),
    ("LSTM", "forward", {}, None),
    ("LSTM", "reverse", {"clip": 0.5}, None),
    ("LSTM", "bidirectional", {}, ["Sigmoid", "LeakyRelu", "Softplus", "HardSigmoid", "Tanh", "Elu"]),
    ("LSTM", "forward", {"input_forget": 1}, ["ThresholdedRelu", "ScaledTanh", "Affine"]),
]


def _alphas(acts: list[str], rng: np.random.Generator) -> tuple[list[float], list[float]]:
    """Random alpha/beta lists in onnxruntime's compact form (only for activations taking them)."""
    al = [float(np.float32(rng.uniform(0.1, 0.9))) for a in acts if a in ref.TAKES_ALPHA]
    be = [float(np.float32(rng.uniform(0.1, 0.9))) for a in acts if a in ref.TAKES_BETA]
    return al, be


@pytest.mark.parametrize(("op", "direction", "extra", "acts"), NODE_CASES)
def test_oracle_matches_onnxruntime_node(op: str, direction: str, extra: dict[str, Any],
                                         acts: list[str] | None, rng: np.random.Generator) -> None:
    D = DIRS[direction]
    feeds = _random_op_inputs(op, rng, D)
    H = feeds["R"].shape[-1]
    attrs: dict[str, Any] = {"hidden_size": H, "direction": direction, **extra}
    kwargs: dict[str, Any] = {k: v for k, v in feeds.items() if k not in ("X", "W", "R")}
    kwargs["direction"] = direction
    if acts is not None:
        al, be = _alphas(acts, rng)
        attrs.update(activations=acts)
        if al:
            attrs["activation_alpha"] = al
        if be:
            attrs["activation_beta"] = be
        kwargs["activations"] = ref.slots_from_attributes(acts, al, be)
    if op == "LSTM" and direction == "forward" and not extra:
        feeds["P"] = rng.normal(0, 0.5, size=(D, 3 * H)).astype(np.float32)
        kwargs["P"] = feeds["P"]
    if "clip" in extra:
        kwargs["clip"] = extra["clip"]
    if "linear_before_reset" in extra:
        kwargs["linear_before_reset"] = extra["linear_before_reset"]
    if "input_forget" in extra:
        kwargs["input_forget"] = bool(extra["input_forget"])
    n_out = 3 if op == "LSTM" else 2
    got = _run_node(op, feeds, attrs, n_out)
    want = ORACLE[op](feeds["X"], feeds["W"], feeds["R"], **kwargs)
    for g, w in zip(got, want, strict=True):
        np.testing.assert_allclose(g, w, atol=TIGHT, rtol=TIGHT)


@pytest.mark.parametrize("op", ["RNN", "GRU", "LSTM"])
def test_oracle_sequence_lens(op: str, rng: np.random.Generator) -> None:
    """Per-row lengths incl. 0 and T, both directions (FACTS.md: zeros past len, len 0 → zero finals)."""
    feeds = _random_op_inputs(op, rng, 2, T=5, N=4)
    feeds["sequence_lens"] = np.array([5, 3, 0, 1], np.int32)
    attrs: dict[str, Any] = {"hidden_size": feeds["R"].shape[-1], "direction": "bidirectional"}
    got = _run_node(op, feeds, attrs, 3 if op == "LSTM" else 2)
    kwargs = {k: v for k, v in feeds.items() if k not in ("X", "W", "R")}
    want = ORACLE[op](feeds["X"], feeds["W"], feeds["R"], direction="bidirectional", **kwargs)
    for g, w in zip(got, want, strict=True):
        np.testing.assert_allclose(g, w, atol=TIGHT, rtol=TIGHT)
    assert np.all(want[0][3:, :, 1] == 0.0) and np.all(want[1][:, 2] == 0.0)


def test_alpha_lists_are_consumed_only_by_parameterised_activations(rng: np.random.Generator) -> None:
    """onnxruntime reads ``[Sigmoid, LeakyRelu]`` + ``alpha=[0.2]`` as LeakyRelu(0.2): measured,
    since the spec text ("consumed in the order of activation functions") allows two readings."""
    feeds = _random_op_inputs("GRU", rng, 1)
    base = {"hidden_size": 3, "activations": ["Sigmoid", "LeakyRelu"]}
    compact = _run_node("GRU", feeds, {**base, "activation_alpha": [0.2]}, 1)[0]
    per_slot = _run_node("GRU", feeds, {**base, "activation_alpha": [0.0, 0.2]}, 1)[0]
    kwargs = {k: v for k, v in feeds.items() if k not in ("X", "W", "R")}
    want = ref.onnx_gru(feeds["X"], feeds["W"], feeds["R"], activations=["Sigmoid", ("LeakyRelu", 0.2, 0.0)],
                        **kwargs)[0]
    np.testing.assert_allclose(compact, want, atol=TIGHT)
    assert np.abs(per_slot - want).max() > 1e-3  # the per-slot reading gives LeakyRelu slope 0


# ----- 2. Keras layers vs the oracle ----------------------------------------------------------
# Keras activation name → ONNX slot (FACTS.md; Keras 3 hard_sigmoid is clip(x/6 + 1/2, 0, 1)).
KERAS_TO_SLOT: dict[str, ref.Slot] = {
    "tanh": "Tanh", "sigmoid": "Sigmoid", "relu": "Relu", "linear": ("Affine", 1.0, 0.0),
    "hard_sigmoid": ("HardSigmoid", 1 / 6, 0.5), "elu": ("Elu", 1.0, 0.0), "softsign": "Softsign",
    "softplus": "Softplus", "leaky_relu": ("LeakyRelu", 0.2, 0.0),
}
KERAS_CASES = [
    ("rnn", {}), ("rnn", {"go_backwards": True, "activation": "relu"}),
    ("gru", {}), ("gru", {"reset_after": False}), ("gru", {"go_backwards": True, "use_bias": False}),
    ("gru", {"recurrent_activation": "hard_sigmoid", "activation": "softsign"}),
    ("lstm", {}), ("lstm", {"go_backwards": True}), ("lstm", {"use_bias": False, "activation": "elu"}),
    ("lstm", {"recurrent_activation": "hard_sigmoid", "activation": "leaky_relu"}),
]


def _oracle_for_keras_layer(kind: str, layer: Any, x: Array) -> list[Array]:
    """Keras-style outputs [sequence (Keras order), h(, c)] from the oracle on the layer's weights."""
    cell = layer.cell
    bias = cell.bias.numpy() if cell.use_bias else None
    W, R, B = ref.keras_to_onnx(kind, cell.kernel.numpy(), cell.recurrent_kernel.numpy(), bias,
                                reset_after=bool(getattr(cell, "reset_after", False)))
    act = KERAS_TO_SLOT[layer.get_config()["activation"]]
    direction = "reverse" if layer.go_backwards else "forward"
    X = np.transpose(x, (1, 0, 2))
    if kind == "rnn":
        Y, Y_h = ref.onnx_rnn(X, W, R, B, direction=direction, activations=[act])
        rest = [Y_h[0]]
    else:
        rec = KERAS_TO_SLOT[layer.get_config()["recurrent_activation"]]
        if kind == "gru":
            Y, Y_h = ref.onnx_gru(X, W, R, B, direction=direction, activations=[rec, act],
                                  linear_before_reset=int(cell.reset_after))
            rest = [Y_h[0]]
        else:
            Y, Y_h, Y_c = ref.onnx_lstm(X, W, R, B, direction=direction, activations=[rec, act, act])
            rest = [Y_h[0], Y_c[0]]
    seq = np.transpose(Y[:, 0], (1, 0, 2))
    if layer.go_backwards:
        seq = seq[:, ::-1]  # Keras returns a go_backwards sequence in reversed order (FACTS.md)
    return [seq, *rest]


@pytest.mark.parametrize(("kind", "opts"), KERAS_CASES)
def test_oracle_matches_keras_and_export(kind: str, opts: dict[str, Any], rng: np.random.Generator) -> None:
    layer = km.recurrent(kind, 4, return_sequences=True, return_state=True, **opts)
    model = km.functional((None, 3), lambda x: layer(x), rng)
    x = rng.normal(size=(2, 6, 3)).astype(np.float32)
    want = _oracle_for_keras_layer(kind, layer, x)
    from_keras = km.keras_outputs(model, [x])
    from_onnx = km.onnx_outputs(km.export(model), [x])
    for k_val, o_val, w in zip(from_keras, from_onnx, want, strict=True):
        np.testing.assert_allclose(k_val, w, atol=TIGHT, rtol=TIGHT)  # (a) Keras layer vs oracle
        np.testing.assert_allclose(o_val, w, atol=TIGHT, rtol=TIGHT)  # (b) exported graph vs oracle


def test_oracle_long_sequence_matches_keras(rng: np.random.Generator) -> None:
    """T = 1000, float64 oracle vs Keras float32: the Keras error itself stays tiny."""
    layer = km.recurrent("lstm", 6, return_sequences=True, return_state=True)
    model = km.functional((None, 3), lambda x: layer(x), rng, scale=0.3)
    x = rng.normal(size=(1, 1000, 3)).astype(np.float32)
    want = _oracle_for_keras_layer("lstm", layer, x)
    for k_val, w in zip(km.keras_outputs(model, [x], compiled=True), want, strict=True):
        np.testing.assert_allclose(k_val, w, atol=1e-4, rtol=1e-4)


# ----- 3. onnx.reference evaluator on exported graphs ---------------------------------------
def _reference_model_cases(k: Any) -> dict[str, Any]:
    return {
        "lstm-bidi-initial": lambda x, h1, c1, h2, c2: k.layers.Bidirectional(
            k.layers.LSTM(4, return_sequences=True))(x, initial_state=[h1, c1, h2, c2]),
        "gru-both-resets": lambda x: k.layers.GRU(3, reset_after=False, go_backwards=True)(
            k.layers.GRU(4, return_sequences=True)(x)),
        "rnn-dense": lambda x: k.layers.Dense(2, activation="softmax")(
            k.layers.SimpleRNN(4, return_sequences=True)(x)),
    }


@pytest.mark.parametrize("name", ["lstm-bidi-initial", "gru-both-resets", "rnn-dense"])
def test_onnx_reference_evaluator_agrees(name: str, rng: np.random.Generator) -> None:
    """Default activations only: there the ``onnx.reference`` evaluator models the ops (FACTS.md)."""
    from onnx.reference import ReferenceEvaluator

    k = km.keras()
    body = _reference_model_cases(k)[name]
    shapes: list[tuple[int | None, ...]] = [(None, 3)] + ([(4,)] * 4 if name.startswith("lstm") else [])
    model = km.functional(shapes, body, rng)
    onnx_model = km.export(model)
    for n in onnx_model.graph.node:  # precondition: nothing the evaluator would silently ignore
        attrs = {a.name: helper.get_attribute_value(a) for a in n.attribute}
        assert "clip" not in attrs
        assert len(n.input) < 5 or n.input[4] == ""  # no sequence_lens
        defaults = {"LSTM": [b"Sigmoid", b"Tanh", b"Tanh"], "GRU": [b"Sigmoid", b"Tanh"], "RNN": [b"Tanh"]}
        if n.op_type in defaults:
            assert attrs["activations"] == defaults[n.op_type] * (len(attrs["activations"]) // len(
                defaults[n.op_type]))
    feeds = km.inputs_for(model, rng, batch=2, time=5)
    names = [i.name for i in onnx_model.graph.input]
    ev = ReferenceEvaluator(onnx_model).run(None, dict(zip(names, feeds, strict=True)))
    rt = km.onnx_outputs(onnx_model, feeds)
    for a, b in zip(ev, rt, strict=True):
        np.testing.assert_allclose(a, b, atol=1e-6, rtol=1e-6)


# ----- hand-worked example --------------------------------------------------------------------
def test_hand_worked_zero_weights() -> None:
    """Zero kernels, known biases, closed-form states (worked by hand from the equations).

    With W = R = 0 every gate is constant: LSTM i = σ(b_i), f = σ(b_f), o = σ(b_o),
    c̃ = tanh(b_c). Choose b_i = b_f = b_o = 0 (σ(0) = 1/2) and b_c = ln 2, so
    tanh(ln 2) = (4 − 1)/(4 + 1) = 0.6 exactly. From C_0 = 0:
      step 1: C_1 = ½·0.6 = 0.3,          h_1 = ½·tanh(0.3)  ≈ 0.1456563062
      step 2: C_2 = ½·0.3 + 0.3 = 0.45,   h_2 = ½·tanh(0.45) ≈ 0.2109495026
    GRU (Keras z, r, h; reset_after=False), b_z = 0, b_h = ln 2, H_0 = 0:
      H_1 = (1 − ½)·0.6 = 0.3,  H_2 = ½·0.6 + ½·0.3 = 0.45
    SimpleRNN, b = ln 2: h_t = tanh(ln 2) = 0.6 for every t.
    (tanh(0.3) ≈ 0.2913126125 and tanh(0.45) ≈ 0.4218990053, values from memory; the test
    computes them with math.tanh.)
    """
    k = km.keras()
    ln2 = math.log(2.0)
    x = np.ones((1, 2, 3), np.float32)
    lstm_bias = np.zeros(8, np.float32)
    lstm_bias[4:6] = ln2  # Keras LSTM bias blocks i, f, c, o (H = 2): c is [4:6]
    gru_bias = np.zeros(6, np.float32)
    gru_bias[4:6] = ln2  # Keras GRU blocks z, r, h: h is [4:6]
    cases = [
        (k.layers.LSTM(2, return_sequences=True), [np.zeros((3, 8)), np.zeros((2, 8)), lstm_bias],
         [0.5 * math.tanh(0.3), 0.5 * math.tanh(0.45)]),
        (k.layers.GRU(2, return_sequences=True, reset_after=False),
         [np.zeros((3, 6)), np.zeros((2, 6)), gru_bias],
         [0.3, 0.45]),
        (k.layers.SimpleRNN(2, return_sequences=True), [np.zeros((3, 2)), np.zeros((2, 2)), np.full(2, ln2)],
         [0.6, 0.6]),
    ]
    for layer, weights, expected in cases:
        inp = k.Input((None, 3), name="x")
        model = k.Model(inp, layer(inp))
        layer.set_weights([np.asarray(w, np.float32) for w in weights])
        want = np.repeat(np.asarray(expected)[None, :, None], 2, axis=2)
        np.testing.assert_allclose(km.keras_outputs(model, [x])[0], want, atol=1e-6)
        np.testing.assert_allclose(km.onnx_outputs(km.export(model), [x])[0], want, atol=1e-6)
    W = np.zeros((1, 8, 3))
    R = np.zeros((1, 8, 2))
    B = np.zeros((1, 16))
    B[0, 6:8] = ln2  # ONNX LSTM blocks i, o, f, c: c is [6:8]
    Y, _, Y_c = ref.onnx_lstm(np.ones((2, 1, 3)), W, R, B)
    np.testing.assert_allclose(Y[:, 0, 0, 0], [0.5 * math.tanh(0.3), 0.5 * math.tanh(0.45)], atol=1e-12)
    np.testing.assert_allclose(Y_c[0, 0], [0.45, 0.45], atol=1e-12)
    assert math.isclose(math.tanh(ln2), 0.6, rel_tol=1e-15)
