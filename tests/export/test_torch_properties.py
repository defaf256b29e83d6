"""Property tests: random recurrent stacks exported and matched; every supported opset runs.

Each hypothesis example builds a module from drawn options (kind, layers, directions, batch
order, bias, sizes, initial states, head), exports it, and compares torch with onnxruntime and
with the NumPy reading of the PyTorch documentation (``torch_reference``).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
import torch
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from torch import nn as tnn

from seqgate.export.run import MAX_OPSET, MIN_OPSET
from torch_models import check, export, rand, randomize, run_onnx, torch_outputs, worst
from torch_reference import run_module

torch.set_num_threads(1)


class Stack(tnn.Module):
    """Two recurrent modules in a row, optional initial state for the first, optional head."""

    def __init__(self, o: dict[str, Any]) -> None:
        super().__init__()
        cls = {"lstm": tnn.LSTM, "gru": tnn.GRU, "rnn": tnn.RNN}
        d = 2 if o["bidirectional"] else 1
        extra = {"nonlinearity": o["nonlinearity"]} if o["kind"] == "rnn" else {}
        self.first = cls[o["kind"]](o["input"], o["hidden"], num_layers=o["layers"], bias=o["bias"],
                                    bidirectional=o["bidirectional"], batch_first=o["batch_first"], **extra)
        self.second = cls[o["kind2"]](o["hidden"] * d, o["hidden2"], batch_first=o["batch_first"])
        self.head = tnn.Linear(o["hidden2"], 3) if o["head"] else None
        self.kind = o["kind"]
        self.batch_first = o["batch_first"]

    def forward(self, x: torch.Tensor, h0: torch.Tensor) -> Any:
        state = (h0, torch.zeros_like(h0)) if self.kind == "lstm" else h0
        y, _ = self.first(x, state)
        z, hn = self.second(y)
        if self.head is None:
            return z, hn
        last = z[:, -1] if self.batch_first else z[-1]
        return self.head(last)


options = st.fixed_dictionaries({
    "kind": st.sampled_from(["lstm", "gru", "rnn"]), "kind2": st.sampled_from(["lstm", "gru", "rnn"]),
    "layers": st.integers(1, 3), "bidirectional": st.booleans(), "batch_first": st.booleans(),
    "bias": st.booleans(), "nonlinearity": st.sampled_from(["tanh", "relu"]),
    "input": st.integers(1, 6), "hidden": st.integers(1, 8), "hidden2": st.integers(1, 5),
    "head": st.booleans(), "batch": st.integers(1, 3), "time": st.integers(1, 12),
    "seed": st.integers(0, 2**16),
})


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(o=options)
def test_random_stacks_match_torch(o: dict[str, Any]) -> None:
    m = randomize(Stack(o), seed=o["seed"])
    rng = np.random.default_rng(o["seed"])
    n, t, d = o["batch"], o["time"], 2 if o["bidirectional"] else 1
    x = rand(rng, n, t, o["input"]) if o["batch_first"] else rand(rng, t, n, o["input"])
    h0 = rand(rng, o["layers"] * d, n, o["hidden"])
    feeds = {"x": x, "h0": h0}
    model = export(m)
    got = run_onnx(model, feeds)
    worst(torch_outputs(m, feeds), got)
    # The first module alone against the PyTorch documentation's equations.
    params = {k: v.numpy() for k, v in m.first.state_dict().items()}
    ref = run_module(o["kind"], params, x, o["layers"], o["bidirectional"], o["batch_first"],
                     relu=o["nonlinearity"] == "relu", h0=h0, c0=np.zeros_like(h0))
    with torch.no_grad():
        y, _ = m.first(torch.from_numpy(x), (torch.from_numpy(h0), torch.zeros(h0.shape))
                       if o["kind"] == "lstm" else torch.from_numpy(h0))
    worst([ref["output"]], [y.numpy()])


class Mixed(tnn.Module):
    """Ops whose ONNX form changed across opsets: reductions, Slice, Squeeze/Unsqueeze, Split."""

    def __init__(self) -> None:
        super().__init__()
        self.rnn = tnn.GRU(4, 6, num_layers=2, bidirectional=True, batch_first=True)
        self.norm = tnn.LayerNorm(12)

    def forward(self, x: torch.Tensor) -> Any:
        y, h = self.rnn(x)
        a, b = self.norm(y).chunk(2, dim=-1)
        pooled = (a * b).mean(1) + y.amax(1)[:, :6] + y.sum(dim=1, keepdim=True).squeeze(1)[:, 6:]
        return pooled.unsqueeze(0), h[-1]


@pytest.mark.parametrize("opset", range(MIN_OPSET, MAX_OPSET + 1))
def test_every_opset_runs(opset: int, rng: np.random.Generator) -> None:
    check(randomize(Mixed()), {"x": rand(rng, 2, 7, 4)}, opset=opset)


def test_export_is_deterministic() -> None:
    m = randomize(Mixed())
    assert export(m).SerializeToString(deterministic=True) == export(m).SerializeToString(deterministic=True)


def test_onnx_input_shapes_are_symbolic(rng: np.random.Generator) -> None:
    model = export(randomize(Mixed()))
    dims = [d.dim_param or d.dim_value for d in model.graph.input[0].type.tensor_type.shape.dim]
    assert dims == ["batch", "time", 4]
    outs = {o.name: [d.dim_param or d.dim_value for d in o.type.tensor_type.shape.dim]
            for o in model.graph.output}
    assert outs == {"output_0": [1, "batch", 6], "output_1": ["batch", 6]}
    for n, t in ((1, 1), (5, 30)):
        feeds = {"x": rand(rng, n, t, 4)}
        worst(torch_outputs(randomize(Mixed()), feeds), run_onnx(model, feeds))
