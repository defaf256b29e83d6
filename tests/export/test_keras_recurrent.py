"""Keras recurrent layers vs their exported ONNX graphs under onnxruntime, option by option.

The reference is Keras itself (the source framework), run in inference mode on the same
float32 inputs; the rule is issue 2's ``|onnx − keras| <= 1e-4 + 1e-4·|keras|``. Probe values
are checked against Keras sequences/states computed by a separate clone of each layer.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

import keras_models as km

pytestmark = pytest.mark.filterwarnings("ignore:__array__ implementation:DeprecationWarning")

KINDS = ("rnn", "gru", "lstm")


# ----- return options, go_backwards, use_bias, reset_after ----------------------------------
OPTION_CASES = [
    # (kind, return_sequences, return_state, go_backwards, use_bias, extra, batch)
    *[(k, False, False, False, True, {}, 1) for k in KINDS],
    *[(k, True, False, False, True, {}, 3) for k in KINDS],
    *[(k, True, True, True, True, {}, 2) for k in KINDS],
    *[(k, False, True, True, False, {}, 1) for k in KINDS],
    *[(k, True, True, False, False, {}, 2) for k in KINDS],
    ("gru", True, True, False, True, {"reset_after": False}, 2),
    ("gru", False, True, True, True, {"reset_after": False}, 1),
    ("gru", True, False, True, False, {"reset_after": False}, 3),
    # dropout inside the layer is inert at inference (FACTS.md)
    ("lstm", True, False, False, True, {"dropout": 0.3, "recurrent_dropout": 0.3}, 2),
    ("gru", False, False, True, True, {"dropout": 0.5, "recurrent_dropout": 0.2}, 2),
]


@pytest.mark.parametrize(("kind", "seqs", "state", "back", "bias", "extra", "batch"), OPTION_CASES)
def test_recurrent_options(kind: str, seqs: bool, state: bool, back: bool, bias: bool,
                           extra: dict[str, Any], batch: int, rng: np.random.Generator) -> None:
    layer_opts = dict(return_sequences=seqs, return_state=state, go_backwards=back, use_bias=bias, **extra)
    model = km.functional((None, 3), lambda x: km.recurrent(kind, 5, **layer_opts)(x), rng)
    km.check_model(model, km.inputs_for(model, rng, batch=batch, time=6), f"{kind} {layer_opts}")


# ----- every in-cell activation with an exact ONNX equivalent --------------------------------
def _cell_activations() -> list[Any]:
    return ["tanh", "sigmoid", "relu", "linear", "hard_sigmoid", "elu", "softsign", "softplus",
            "leaky_relu", ("LeakyReLU", 0.3)]


@pytest.mark.parametrize("act", _cell_activations(), ids=str)
def test_cell_activations(act: Any, rng: np.random.Generator) -> None:
    """Each activation in every slot kind: RNN f, GRU g (after a default f), LSTM f and g/h.

    The GRU and LSTM slots after a parameter-free activation pin the alpha/beta packing
    (a leaky_relu after Sigmoid must still get its slope).
    """
    k = km.keras()

    def a() -> Any:
        return k.layers.LeakyReLU(negative_slope=act[1]) if isinstance(act, tuple) else act

    def body(x: Any) -> Any:
        y = k.layers.SimpleRNN(4, activation=a(), return_sequences=True)(x)
        y = k.layers.GRU(4, activation=a(), return_sequences=True)(y)
        y = k.layers.GRU(4, recurrent_activation=a(), reset_after=False, return_sequences=True)(y)
        y = k.layers.LSTM(4, recurrent_activation=a(), return_sequences=True)(y)
        return k.layers.LSTM(4, activation=a(), recurrent_activation="hard_sigmoid")(y)

    model = km.functional((None, 3), body, rng, scale=0.4)
    km.check_model(model, km.inputs_for(model, rng, batch=2, time=6), f"activation {act}")


# ----- stacks --------------------------------------------------------------------------------
def test_stack_depth_four_sequential(rng: np.random.Generator) -> None:
    k = km.keras()
    model = km.sequential((None, 4), [
        k.layers.LSTM(6, return_sequences=True),
        k.layers.GRU(5, return_sequences=True, go_backwards=True),
        k.layers.SimpleRNN(4, return_sequences=True),
        k.layers.GRU(3, reset_after=False),
        k.layers.Dense(2),
    ], rng)
    for batch, time in ((1, 1), (4, 9)):
        km.check_model(model, km.inputs_for(model, rng, batch, time), f"stack batch {batch} T {time}")


def test_rnn_layer_with_builtin_cell(rng: np.random.Generator) -> None:
    k = km.keras()
    layer = k.layers.RNN(k.layers.LSTMCell(4), return_sequences=True)
    model = km.functional((None, 3), lambda x: layer(x), rng)
    km.check_model(model, km.inputs_for(model, rng), "RNN(LSTMCell)")


# ----- Bidirectional ---------------------------------------------------------------------
BIDI_CASES = [
    ("lstm", "concat", True, False), ("gru", "concat", False, False), ("rnn", "concat", True, True),
    ("gru", "sum", True, False), ("lstm", "sum", False, True),
    ("rnn", "mul", True, False), ("lstm", "mul", False, False),
    ("lstm", "ave", True, True), ("gru", "ave", False, False),
    ("gru", None, True, True), ("lstm", None, False, False), ("rnn", None, False, True),
    ("lstm", "concat", False, True),
]


@pytest.mark.parametrize(("kind", "mode", "seqs", "state"), BIDI_CASES)
def test_bidirectional(kind: str, mode: str | None, seqs: bool, state: bool, rng: np.random.Generator) -> None:
    k = km.keras()
    extra = {"reset_after": False} if (kind == "gru" and mode == "sum") else {}
    inner = km.recurrent(kind, 4, return_sequences=seqs, return_state=state, **extra)
    model = km.functional((None, 3), lambda x: k.layers.Bidirectional(inner, merge_mode=mode)(x), rng)
    km.check_model(model, km.inputs_for(model, rng, batch=2, time=5), f"Bidirectional {kind} {mode}")


# ----- initial_state tensors in a Functional graph ---------------------------------------
@pytest.mark.parametrize("kind", KINDS)
def test_initial_state_inputs(kind: str, rng: np.random.Generator) -> None:
    n_states = 2 if kind == "lstm" else 1
    shapes: list[tuple[int | None, ...]] = [(None, 3)] + [(4,)] * n_states

    def body(x: Any, *states: Any) -> Any:
        layer = km.recurrent(kind, 4, return_sequences=True, go_backwards=kind == "gru")
        return layer(x, initial_state=list(states))

    model = km.functional(shapes, body, rng)
    assert len(model.inputs) == 1 + n_states
    km.check_model(model, km.inputs_for(model, rng, batch=3, time=5), f"{kind} initial_state")


def test_bidirectional_initial_state(rng: np.random.Generator) -> None:
    k = km.keras()

    def body(x: Any, h_f: Any, c_f: Any, h_b: Any, c_b: Any) -> Any:
        bi = k.layers.Bidirectional(k.layers.LSTM(4, return_sequences=True, return_state=True))
        return bi(x, initial_state=[h_f, c_f, h_b, c_b])

    model = km.functional([(None, 3), (4,), (4,), (4,), (4,)], body, rng)
    km.check_model(model, km.inputs_for(model, rng, batch=2, time=5), "Bidirectional initial_state")


def test_initial_state_from_encoder(rng: np.random.Generator) -> None:
    """Encoder states feed a decoder (a tensor shared by several layers)."""
    k = km.keras()

    def body(enc_in: Any, dec_in: Any) -> Any:
        _, h, c = k.layers.LSTM(5, return_state=True)(enc_in)
        y = k.layers.LSTM(5, return_sequences=True)(dec_in, initial_state=[h, c])
        return [k.layers.Dense(3, activation="softmax")(y), k.layers.Dense(2)(h)]

    model = km.functional([(None, 3), (None, 2)], body, rng)
    km.check_model(model, km.inputs_for(model, rng, batch=2, time=4), "encoder-decoder")


# ----- probes ------------------------------------------------------------------------------
def _keras_states(model: Any, layer: Any, feeds: list[np.ndarray]) -> dict[str, np.ndarray]:
    """Per direction, the hidden sequence (input order) and final states of ``layer``, from a clone.

    The clone returns sequences and states; ``go_backwards`` sequences come back reversed, so
    they are flipped to put index t = state after input t (DESIGN.md probe convention).
    """
    k = km.keras()
    sub = k.Model(model.inputs, layer.input)
    x = sub(list(feeds)).numpy()
    cfg = layer.get_config()
    if type(layer).__name__ == "Bidirectional":
        parts = {"forward": layer.forward_layer, "reverse": layer.backward_layer}
    else:
        parts = {"reverse" if cfg["go_backwards"] else "forward": layer}
    out: dict[str, np.ndarray] = {}
    for label, part in parts.items():
        c = part.get_config()
        c.update(return_sequences=True, return_state=True, name=f"{c['name']}_clone")
        clone = type(part).from_config(c)
        clone(x)
        clone.set_weights(part.get_weights())
        res = [v.numpy() for v in clone(x)]
        seq = res[0][:, ::-1] if c["go_backwards"] else res[0]
        out[f"{label}/hidden_sequence"] = seq[:, :, None, :]
        out[f"{label}/hidden_final"] = res[1][:, None, :]
        if len(res) == 3:
            out[f"{label}/cell_final"] = res[2][:, None, :]
    return out


def test_probes_match_keras_states(rng: np.random.Generator) -> None:
    from seqgate.onnxfile.probes import read_probe_map, to_canonical, with_probe_outputs

    k = km.keras()

    def body(x: Any) -> Any:
        y = k.layers.LSTM(5, return_sequences=True, go_backwards=True, name="enc")(x)
        y = k.layers.Bidirectional(k.layers.GRU(4, return_sequences=True), name="bi")(y)
        y = k.layers.SimpleRNN(3, name="rnn")(y)
        return k.layers.Bidirectional(k.layers.LSTM(2), merge_mode="sum", name="bi2")(
            k.layers.RepeatVector(3)(y))

    model = km.functional((None, 3), body, rng)
    onnx_model = km.export(model)
    probes = read_probe_map(onnx_model)
    expected = {
        f"{layer}/{d}/{kind}"
        for layer, dirs, lstm in (("enc", ["reverse"], True), ("bi", ["forward", "reverse"], False),
                                  ("rnn", ["forward"], False), ("bi2", ["forward", "reverse"], True))
        for d in dirs
        for kind in ("hidden_sequence", "hidden_final", *(["cell_final"] if lstm else []))
    }
    assert {p.name for p in probes} == expected
    feeds = km.inputs_for(model, rng, batch=2, time=6)
    full = with_probe_outputs(onnx_model, probes)
    values = km.onnx_outputs(full, feeds, [p.value for p in probes])
    for p, v in zip(probes, values, strict=True):
        ref = _keras_states(model, model.get_layer(p.layer), feeds)[f"{p.direction}/{p.kind}"]
        km.assert_matches([to_canonical(p, v)], [ref], p.name)


def test_deployable_graph_leaves_unused_outputs_empty(rng: np.random.Generator) -> None:
    """A layer returning only its last state computes neither Y nor Y_c in the shipped file."""
    model = km.functional((None, 3), lambda x: km.recurrent("lstm", 4)(x), rng)
    onnx_model = km.export(model)
    (node,) = [n for n in onnx_model.graph.node if n.op_type == "LSTM"]
    outs = list(node.output) + [""] * (3 - len(node.output))
    assert outs[0] == "" and outs[2] == "" and outs[1] != ""


# ----- long sequences ------------------------------------------------------------------
LONG_DIFFS: dict[str, float] = {}


@pytest.mark.parametrize(("name", "batch"), [("lstm-stack", 2), ("bidi-gru", 1)])
def test_long_sequence_t1000(name: str, batch: int, rng: np.random.Generator) -> None:
    """T = 1000: float32 error must not grow past the rule; the worst max |Δ| is printed."""
    k = km.keras()
    if name == "lstm-stack":
        layers = [k.layers.LSTM(8, return_sequences=True), k.layers.GRU(8, return_sequences=True),
                  k.layers.SimpleRNN(8, return_sequences=True, go_backwards=True)]
    else:
        layers = [k.layers.Bidirectional(k.layers.GRU(8, return_sequences=True, return_state=False))]
    model = km.sequential((None, 4), layers, rng)
    feeds = km.inputs_for(model, rng, batch=batch, time=1000)
    diff = km.check_model(model, feeds, f"{name} T=1000", compiled=True)
    LONG_DIFFS[name] = diff
    print(f"T=1000 {name}: max |onnx - keras| = {diff:.3g}")
