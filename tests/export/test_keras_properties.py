"""Property tests: random Keras recurrent stacks export and match Keras under onnxruntime.

Hypothesis draws the stack (kinds, sizes, directions, merge modes, return options, in-cell
activations, go_backwards, bias, GRU reset variant), the batch and the length; each model is
built in-process with seeded random weights, exported and compared with issue 2's rule.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import keras_models as km

pytestmark = pytest.mark.filterwarnings("ignore:__array__ implementation:DeprecationWarning")

CELL_ACTS = ["tanh", "sigmoid", "relu", "linear", "hard_sigmoid", "elu", "softsign", "softplus", "leaky_relu"]
# bounded choices for the gates keep random stacks numerically tame (not an exactness limit)
GATE_ACTS = ["sigmoid", "hard_sigmoid", "tanh", "softsign"]


@st.composite
def layer_spec(draw: st.DrawFn) -> dict[str, Any]:
    kind = draw(st.sampled_from(["rnn", "gru", "lstm"]))
    spec: dict[str, Any] = {
        "kind": kind,
        "units": draw(st.integers(1, 6)),
        "bidirectional": draw(st.booleans()),
        "activation": draw(st.sampled_from(CELL_ACTS)),
        "use_bias": draw(st.booleans()),
    }
    if kind != "rnn":
        spec["recurrent_activation"] = draw(st.sampled_from(GATE_ACTS))
    if kind == "gru":
        spec["reset_after"] = draw(st.booleans())
    if spec["bidirectional"]:
        spec["merge_mode"] = draw(st.sampled_from(["concat", "sum", "mul", "ave"]))
    else:
        spec["go_backwards"] = draw(st.booleans())
    return spec


def _layer(spec: dict[str, Any], seqs: bool, state: bool, last_merge: str | None = "concat") -> Any:
    k = km.keras()
    opts = {key: v for key, v in spec.items() if key not in ("kind", "units", "bidirectional", "merge_mode")}
    inner = km.recurrent(spec["kind"], spec["units"], return_sequences=seqs, return_state=state, **opts)
    if spec["bidirectional"]:
        return k.layers.Bidirectional(inner, merge_mode=spec.get("merge_mode", last_merge))
    return inner


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    specs=st.lists(layer_spec(), min_size=1, max_size=3),
    last_seqs=st.booleans(),
    last_state=st.booleans(),
    last_none_merge=st.booleans(),
    batch=st.integers(1, 3),
    time=st.integers(1, 7),
    seed=st.integers(0, 2**16),
)
def test_random_stack_matches_keras(specs: list[dict[str, Any]], last_seqs: bool, last_state: bool,
                                    last_none_merge: bool, batch: int, time: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    last = dict(specs[-1])
    if last["bidirectional"] and last_none_merge:
        last["merge_mode"] = None

    def body(x: Any) -> Any:
        y = x
        for spec in specs[:-1]:
            y = _layer(spec, True, False)(y)
        return _layer(last, last_seqs, last_state)(y)

    model = km.functional((None, 3), body, rng, scale=0.4)
    km.check_model(model, km.inputs_for(model, rng, batch, time), f"stack {specs} seqs={last_seqs}")


@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(spec=layer_spec(), batch=st.integers(1, 3), time=st.integers(1, 6), seed=st.integers(0, 2**16))
def test_random_layer_probes_match_reference(spec: dict[str, Any], batch: int, time: int, seed: int) -> None:
    """Every probe of a random layer against the float64 oracle on the layer's own weights."""
    from seqgate.onnxfile.probes import read_probe_map, to_canonical, with_probe_outputs

    rng = np.random.default_rng(seed)
    layer = _layer(spec, True, False)
    model = km.functional((None, 3), lambda x: layer(x), rng, scale=0.4)
    onnx_model = km.export(model)
    probes = read_probe_map(onnx_model)
    x = rng.normal(size=(batch, time, 3)).astype(np.float32)
    values = km.onnx_outputs(with_probe_outputs(onnx_model, probes), [x], [p.value for p in probes])
    parts = ([layer.forward_layer, layer.backward_layer] if spec["bidirectional"] else [layer])
    for p, v in zip(probes, values, strict=True):
        part = parts[p.direction_index] if spec["bidirectional"] else parts[0]
        want = _oracle_states(spec, part, x)[p.kind]
        km.assert_matches([to_canonical(p, v)], [want], p.name)


_KERAS_TO_SLOT: dict[str, Any] = {
    "tanh": "Tanh", "sigmoid": "Sigmoid", "relu": "Relu", "linear": ("Affine", 1.0, 0.0),
    "hard_sigmoid": ("HardSigmoid", 1 / 6, 0.5), "elu": ("Elu", 1.0, 0.0), "softsign": "Softsign",
    "softplus": "Softplus", "leaky_relu": ("LeakyRelu", 0.2, 0.0),
}


def _oracle_states(spec: dict[str, Any], part: Any, x: np.ndarray) -> dict[str, np.ndarray]:
    """Canonical probe tensors ([N,T,1,H] / [N,1,H]) for one Keras direction, from the oracle."""
    import reference_equations as ref

    kind, cell = spec["kind"], part.cell
    W, R, B = ref.keras_to_onnx(kind, cell.kernel.numpy(), cell.recurrent_kernel.numpy(),
                                cell.bias.numpy() if cell.use_bias else None,
                                reset_after=bool(getattr(cell, "reset_after", False)))
    direction = "reverse" if part.go_backwards else "forward"
    act = _KERAS_TO_SLOT[spec["activation"]]
    X = np.transpose(x, (1, 0, 2))
    out: dict[str, np.ndarray] = {}
    if kind == "rnn":
        Y, Y_h = ref.onnx_rnn(X, W, R, B, direction=direction, activations=[act])
    elif kind == "gru":
        Y, Y_h = ref.onnx_gru(X, W, R, B, direction=direction, linear_before_reset=int(cell.reset_after),
                              activations=[_KERAS_TO_SLOT[spec["recurrent_activation"]], act])
    else:
        Y, Y_h, Y_c = ref.onnx_lstm(X, W, R, B, direction=direction,
                                    activations=[_KERAS_TO_SLOT[spec["recurrent_activation"]], act, act])
        out["cell_final"] = np.transpose(Y_c, (1, 0, 2))
    out["hidden_sequence"] = np.transpose(Y, (2, 0, 1, 3))  # [T,1,N,H] → [N,T,1,H], input order
    out["hidden_final"] = np.transpose(Y_h, (1, 0, 2))
    return out
