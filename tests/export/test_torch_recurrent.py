"""PyTorch RNN/GRU/LSTM export: torch vs onnxruntime vs NumPy equations vs onnx.reference.

External checks: ``torch_reference`` implements the equations of the PyTorch documentation in
PyTorch's own weight layout (independent of seqgate's gate tables); ``reference_equations``
implements the ONNX operator spec; ``onnx.reference`` is onnx's own evaluator. Tolerance is the
issue 3 acceptance rule ``1e-4 + 1e-4·|ref|``.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from onnx import numpy_helper
from onnx.reference import ReferenceEvaluator

from reference_equations import onnx_gru, onnx_lstm, onnx_rnn
from seqgate.onnxfile.probes import read_probe_map, to_canonical, with_probe_outputs
from torch_models import check, export, nn, rand, randomize, run_onnx, torch_outputs, worst
from torch_reference import run_module

torch.set_num_threads(1)
KINDS = ["lstm", "gru", "rnn"]


def _x(rng: np.random.Generator, batch_first: bool, n: int, t: int, i: int = 5) -> np.ndarray:
    return rand(rng, n, t, i) if batch_first else rand(rng, t, n, i)


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("layers", [1, 2])
@pytest.mark.parametrize("bidirectional", [False, True])
@pytest.mark.parametrize("batch_first", [True, False])
def test_module_matches_torch(kind: str, layers: int, bidirectional: bool, batch_first: bool,
                              rng: np.random.Generator) -> None:
    m = randomize(nn().Recurrent(kind, num_layers=layers, bidirectional=bidirectional,
                                 batch_first=batch_first), seed=layers)
    model = export(m)
    for n in (1, 3):
        feeds = {"x": _x(rng, batch_first, n, 9)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))
    first = model.graph.input[0]
    dims = [d.dim_param or d.dim_value for d in first.type.tensor_type.shape.dim]
    assert dims == (["batch", "time", 5] if batch_first else ["time", "batch", 5])
    ops = [n.op_type for n in model.graph.node]
    assert ops.count({"lstm": "LSTM", "gru": "GRU", "rnn": "RNN"}[kind]) == layers  # one node per layer


@pytest.mark.parametrize(("kind", "options"), [
    ("lstm", {"bias": False}), ("gru", {"bias": False}), ("rnn", {"bias": False}),
    ("rnn", {"nonlinearity": "relu", "num_layers": 2, "bidirectional": True}),
    ("lstm", {"num_layers": 3, "dropout": 0.5}), ("gru", {"num_layers": 2, "dropout": 0.3, "bias": False}),
])
def test_options(kind: str, options: dict, rng: np.random.Generator) -> None:
    m = randomize(nn().Recurrent(kind, batch_first=True, **options), seed=3)
    check(m, {"x": rand(rng, 2, 11, 5)})


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("bidirectional", [False, True])
def test_given_initial_states(kind: str, bidirectional: bool, rng: np.random.Generator) -> None:
    layers, d = 2, 2 if bidirectional else 1
    m = randomize(nn().RecurrentWithState(kind, num_layers=layers, bidirectional=bidirectional,
                                          batch_first=False), seed=5)
    feeds = {"x": rand(rng, 8, 3, 5), "h0": rand(rng, layers * d, 3, 7)}
    if kind == "lstm":
        feeds["c0"] = rand(rng, layers * d, 3, 7)
    model = export(m, inputs=["c0:4,batch,7"] if kind == "lstm" and bidirectional else
                   (["c0:2,batch,7"] if kind == "lstm" else None))
    names = [i.name for i in model.graph.input]
    assert names == list(feeds)
    h_dims = [d.dim_param or d.dim_value for d in model.graph.input[1].type.tensor_type.shape.dim]
    assert h_dims == [layers * d, "batch", 7]  # inferred from the consuming module
    worst(torch_outputs(m, feeds), run_onnx(model, feeds))


@pytest.mark.parametrize("kind", KINDS)
def test_pytorch_doc_equations_agree_with_torch_and_onnx(kind: str, rng: np.random.Generator) -> None:
    """The documented equations (float64) agree with torch and with the exported graph."""
    m = randomize(nn().RecurrentWithState(kind, num_layers=2, bidirectional=True, batch_first=False), seed=7)
    x, h0, c0 = rand(rng, 10, 3, 5), rand(rng, 4, 3, 7), rand(rng, 4, 3, 7)
    feeds = {"x": x, "h0": h0, **({"c0": c0} if kind == "lstm" else {})}
    params = {k: v.numpy() for k, v in m.rnn.state_dict().items()}
    ref = run_module(kind, params, x, 2, True, False, h0=h0, c0=c0 if kind == "lstm" else None)
    expected = [ref["output"], ref["h_n"]] + ([ref["c_n"]] if kind == "lstm" else [])
    worst(expected, torch_outputs(m, feeds))
    model = export(m, inputs=["c0:4,batch,7"] if kind == "lstm" else None)
    worst(expected, run_onnx(model, feeds))


@pytest.mark.parametrize("kind", KINDS)
def test_onnx_spec_equations_on_the_exported_weights(kind: str, rng: np.random.Generator) -> None:
    """Each exported layer node, run by the ONNX-spec NumPy oracle, reproduces the torch-doc layer."""
    m = randomize(nn().Recurrent(kind, num_layers=2, bidirectional=True, batch_first=False), seed=11)
    model = export(m)
    inits = {t.name: numpy_helper.to_array(t) for t in model.graph.initializer}
    x = rand(rng, 6, 2, 5)
    ref = run_module(kind, {k: v.numpy() for k, v in m.rnn.state_dict().items()}, x, 2, True, False)
    layer_in = x.astype(np.float64)
    nodes = [n for n in model.graph.node if n.op_type in ("LSTM", "GRU", "RNN")]
    for k, node in enumerate(nodes):
        w, r, b = (inits[node.input[i]] for i in range(1, 4))
        if kind == "lstm":
            y = onnx_lstm(layer_in, w, r, b, direction="bidirectional")[0]
        elif kind == "gru":
            lbr = next(a.i for a in node.attribute if a.name == "linear_before_reset")
            y = onnx_gru(layer_in, w, r, b, direction="bidirectional", linear_before_reset=lbr)[0]
        else:
            y = onnx_rnn(layer_in, w, r, b, direction="bidirectional")[0]
        for d in range(2):  # Y [T, D, N, H] vs the doc equations' [N, T, H]
            np.testing.assert_allclose(y[:, d].transpose(1, 0, 2), ref["seq"][(k, d)], atol=1e-9)
        layer_in = np.concatenate([y[:, 0], y[:, 1]], axis=-1)


@pytest.mark.parametrize("kind", KINDS)
def test_onnx_reference_evaluator_agrees(kind: str, rng: np.random.Generator) -> None:
    """onnx.reference supports the default activations and initial states (FACTS.md)."""
    m = randomize(nn().RecurrentWithState(kind, num_layers=2, bidirectional=True, batch_first=True), seed=2)
    feeds = {"x": rand(rng, 2, 7, 5), "h0": rand(rng, 4, 2, 7)}
    if kind == "lstm":
        feeds["c0"] = rand(rng, 4, 2, 7)
    model = export(m, inputs=["c0:4,batch,7"] if kind == "lstm" else None)
    got = ReferenceEvaluator(model).run(None, feeds)
    worst(torch_outputs(m, feeds), got)
    worst(run_onnx(model, feeds), got, atol=1e-6, rtol=1e-6)


@pytest.mark.parametrize("kind", KINDS)
def test_probes_hold_every_layer_and_direction(kind: str, rng: np.random.Generator) -> None:
    m = randomize(nn().Recurrent(kind, num_layers=2, bidirectional=True, batch_first=True), seed=4)
    model = export(m)
    probes = read_probe_map(model)
    expected_kinds = ["hidden_sequence", "hidden_final"] + (["cell_final"] if kind == "lstm" else [])
    assert sorted(p.name for p in probes) == sorted(
        f"rnn/l{k}/{d}/{q}" for k in range(2) for d in ("forward", "reverse") for q in expected_kinds)
    for p in probes:
        assert p.source == {"framework": "torch", "module": "rnn", "module_type": kind.upper(),
                            "layer_index": p.stack_index, "num_layers": 2, "bidirectional": True,
                            "batch_first": True, "call_index": 0}
        assert p.layer == "rnn"
    x = rand(rng, 3, 8, 5)
    ref = run_module(kind, {k: v.numpy() for k, v in m.rnn.state_dict().items()}, x, 2, True, True)
    full = with_probe_outputs(model, probes)
    names = [o.name for o in full.graph.output]
    values = dict(zip(names, run_onnx(full, {"x": x}), strict=True))
    for p in probes:
        got = to_canonical(p, values[p.value])
        k, d = p.stack_index, p.direction_index
        if p.kind == "hidden_sequence":
            want = ref["seq"][(k, d)][:, :, None, :]
        else:
            want = ref["h_n" if p.kind == "hidden_final" else "c_n"][2 * k + d][:, None, :]
        worst([want], [got])


def test_unused_outputs_are_not_computed() -> None:
    import torch.nn as tnn

    class LastState(tnn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.rnn = tnn.LSTM(5, 7, num_layers=2, batch_first=True)

        def forward(self, x: torch.Tensor) -> torch.Tensor:
            _, (h, _c) = self.rnn(x)
            return h[-1]

    model = export(randomize(LastState()))
    nodes = [n for n in model.graph.node if n.op_type == "LSTM"]
    assert [list(n.output) for n in nodes][1][0] == ""  # last layer's Y is not computed
    assert all(len(n.output) < 3 or n.output[2] == "" for n in nodes)  # no cell state anywhere
    assert json.loads(next(p.value for p in model.metadata_props if p.key == "seqgate.probes"))


def test_same_module_called_twice_gets_call_index(rng: np.random.Generator) -> None:
    import torch.nn as tnn

    class Twice(tnn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.rnn = tnn.GRU(5, 5, batch_first=True)

        def forward(self, x: torch.Tensor) -> torch.Tensor:
            y, _ = self.rnn(x)
            z, _ = self.rnn(y)
            return z

    m = randomize(Twice())
    model = export(m)
    feeds = {"x": rand(rng, 2, 6, 5)}
    worst(torch_outputs(m, feeds), run_onnx(model, feeds))
    probes = read_probe_map(model)
    assert {p.source["call_index"] for p in probes} == {0, 1}
    assert len({p.name for p in probes}) == len(probes)
    assert any(p.name.startswith("rnn/call1/l0/") for p in probes)


LONG = [("lstm", 2, True), ("gru", 2, False), ("rnn", 1, True)]


@pytest.mark.parametrize(("kind", "layers", "bidirectional"), LONG)
def test_long_sequences(kind: str, layers: int, bidirectional: bool, rng: np.random.Generator) -> None:
    """T = 1000, batch 2; the worst |Δ| is printed for the issue's closing note."""
    m = randomize(nn().Recurrent(kind, input_size=8, hidden=16, num_layers=layers,
                                 bidirectional=bidirectional, batch_first=True), seed=9)
    w = check(m, {"x": rand(rng, 2, 1000, 8)})
    print(f"T=1000 {kind} layers={layers} bidirectional={bidirectional}: worst |onnx - torch| = {w:.3g}")
