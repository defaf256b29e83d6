"""Stacked cells stepped inside ONE loop over time (every layer called at each step).

References: PyTorch's own forward of each module below (torch's eager kernels for nn.LSTMCell,
nn.GRUCell, nn.RNNCell; the torch docs say a missing ``hx`` means zero states), run through
onnxruntime and, where noted, through onnx's own evaluator ``onnx.reference.ReferenceEvaluator``
(which runs the ONNX LSTM/GRU/RNN operator equations with their default activations). Tolerance:
``1e-4 + 1e-4·|ref|`` (the project's float32 rule, ``torch_models.worst``). Lengths T = 1, 2, 9
at batch sizes 1 to 3 on an export traced at other lengths (the time axis stays dynamic).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
import torch
from onnx.reference import ReferenceEvaluator
from torch import nn

from seqgate.errors import UnsupportedModelError
from torch_models import cli_export_verify, export, op_types, randomize, run_onnx, torch_outputs, worst

torch.set_num_threads(1)
IN, H = 3, 5
LENGTHS = ((1, 1), (2, 2), (3, 9))  # (batch, T)
CELLS = {"lstm": nn.LSTMCell, "gru": nn.GRUCell, "rnn": nn.RNNCell}


def _x(n: int, t: int, seed: int = 0) -> np.ndarray:
    return np.random.default_rng(seed + 10 * t + n).normal(size=(n, t, IN)).astype(np.float32)


def _ops(model: Any) -> list[str]:
    return [n.op_type for n in model.graph.node]


def _same_as_torch(m: nn.Module, model: Any, reference: bool = False) -> None:
    """onnxruntime (and ``onnx.reference`` when asked) agree with the module's own forward."""
    for n, t in LENGTHS:
        x = _x(n, t)
        want = torch_outputs(m, {"x": x})  # reference: PyTorch's own forward
        worst(want, run_onnx(model, {"x": x}))
        if reference:  # reference: onnx's own evaluator on the same file
            worst(want, ReferenceEvaluator(model).run(None, {"x": x}))


def _cells(kind: str, layers: int) -> nn.ModuleList:
    return nn.ModuleList([CELLS[kind](IN if i == 0 else H, H) for i in range(layers)])


class Lists(nn.Module):
    """``h[l], c[l] = cell(inp, (h[l], c[l])); inp = h[l]`` (``h[l] = cell(inp, h[l])`` for
    GRU/RNN) from zero states; returns the top layer's sequence and every layer's final h."""

    def __init__(self, kind: str, layers: int) -> None:
        super().__init__()
        self.kind = kind
        self.cells = _cells(kind, layers)

    def forward(self, x: torch.Tensor) -> Any:
        h = [torch.zeros(x.size(0), H) for _ in self.cells]
        c = [torch.zeros(x.size(0), H) for _ in self.cells]
        outs = []
        for t in range(x.size(1)):
            inp = x[:, t]
            for i, cell in enumerate(self.cells):
                if self.kind == "lstm":
                    h[i], c[i] = cell(inp, (h[i], c[i]))
                else:
                    h[i] = cell(inp, h[i])
                inp = h[i]
            outs.append(inp)
        return torch.stack(outs, 1), torch.stack(h, 0)


class States(nn.Module):
    """``states[l] = cell(inp, states[l]); inp = states[l][0]`` with states starting as None
    (``start="none"``) or as zero (h, c) tuples (``start="zeros"``)."""

    def __init__(self, layers: int, start: str) -> None:
        super().__init__()
        self.start = start
        self.cells = _cells("lstm", layers)

    def forward(self, x: torch.Tensor) -> Any:
        states: list[Any] = [None for _ in self.cells]
        if self.start == "zeros":
            states = [(torch.zeros(x.size(0), H), torch.zeros(x.size(0), H)) for _ in self.cells]
        outs = []
        for t in range(x.size(1)):
            inp = x[:, t]
            for i, cell in enumerate(self.cells):
                states[i] = cell(inp, states[i])
                inp = states[i][0]
            outs.append(inp)
        return torch.stack(outs, 1)


@pytest.mark.parametrize("layers", [2, 3])
def test_lstm_cell_layers_in_one_loop_are_one_lstm_node_per_layer(layers: int) -> None:
    m = randomize(Lists("lstm", layers), seed=layers)
    model = export(m)
    assert _ops(model).count("LSTM") == layers, _ops(model)
    _same_as_torch(m, model, reference=True)


@pytest.mark.parametrize("kind", ["gru", "rnn"])
def test_gru_and_rnn_cell_layers_in_one_loop(kind: str) -> None:
    m = randomize(Lists(kind, 2), seed=5)
    model = export(m)
    assert _ops(model).count(kind.upper()) == 2, _ops(model)
    _same_as_torch(m, model, reference=kind == "gru")


@pytest.mark.parametrize("start", ["none", "zeros"])
@pytest.mark.parametrize("layers", [2, 3])
def test_state_tuples_per_layer_in_one_loop(start: str, layers: int) -> None:
    m = randomize(States(layers, start), seed=7)
    model = export(m)
    assert _ops(model).count("LSTM") == layers, _ops(model)
    _same_as_torch(m, model)


class PreviousAbove(nn.Module):
    """Layer 1's input mixes layer 0's step output with layer 1's PREVIOUS-step h (read before
    layer 1 runs): not two consecutive loops."""

    def __init__(self) -> None:
        super().__init__()
        self.cells = _cells("gru", 2)

    def forward(self, x: torch.Tensor) -> Any:
        h = [torch.zeros(x.size(0), H) for _ in self.cells]
        outs = []
        for t in range(x.size(1)):
            inp = x[:, t]
            for i, cell in enumerate(self.cells):
                h[i] = cell(inp, h[i])
                inp = h[i] + h[i + 1] if i + 1 < len(h) else h[i]
            outs.append(inp)
        return torch.stack(outs, 1)


def test_a_layer_reading_the_previous_step_of_the_layer_above_is_refused() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(PreviousAbove()))
    assert e.value.exit_code == 3
    assert "cells.0 (GRUCell)" in str(e.value) and "read by" in str(e.value), str(e.value)


FACTORY = """
import torch
from torch import nn


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.cells = nn.ModuleList([nn.LSTMCell(3, 5), nn.LSTMCell(5, 5)])

    def forward(self, x):
        h = [torch.zeros(x.size(0), 5) for _ in self.cells]
        c = [torch.zeros(x.size(0), 5) for _ in self.cells]
        outs = []
        for t in range(x.size(1)):
            inp = x[:, t]
            for i, cell in enumerate(self.cells):
                h[i], c[i] = cell(inp, (h[i], c[i]))
                inp = h[i]
            outs.append(inp)
        return torch.stack(outs, 1)


def make():
    return Net()
"""


def test_cli_export_and_verify_compare_every_layers_step_states(tmp_path: Any) -> None:
    names = cli_export_verify(tmp_path, FACTORY)
    want = {f"cells.{i}/forward/{k}" for i in (0, 1) for k in ("hidden_sequence", "hidden_final")}
    assert want <= names, names


class LaggedAbove(nn.Module):
    """The top layer runs first each step, so it reads layer 0's output of the PREVIOUS step."""

    def __init__(self) -> None:
        super().__init__()
        self.cells = _cells("gru", 2)

    def forward(self, x: torch.Tensor) -> Any:
        h = [torch.zeros(x.size(0), H) for _ in self.cells]
        outs = []
        for t in range(x.size(1)):
            h[1] = self.cells[1](h[0], h[1])
            h[0] = self.cells[0](x[:, t], h[0])
            outs.append(h[1])
        return torch.stack(outs, 1)


def test_a_layer_reading_the_step_before_of_the_layer_below_is_refused() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(LaggedAbove()))
    assert e.value.exit_code == 3
    assert "cells.0 (GRUCell)" in str(e.value) and "read by cells.1" in str(e.value), str(e.value)


class UserElman(nn.Module):
    """A user-written cell: h' = tanh(W x + U h) (Elman 1990), times sigmoid(V x) when ``gated``
    (no published cell: stays an ONNX Scan of the traced step)."""

    def __init__(self, size_in: int, gated: bool) -> None:
        super().__init__()
        self.input_size = size_in  # how seqgate infers the loop input's feature size
        self.gated = gated
        self.W, self.V = nn.Linear(size_in, H), nn.Linear(size_in, H)
        self.U = nn.Linear(H, H, bias=False)

    def forward(self, x: torch.Tensor, h: torch.Tensor) -> torch.Tensor:
        out = torch.tanh(self.W(x) + self.U(h))
        return out * torch.sigmoid(self.V(x)) if self.gated else out


class UserLayers(nn.Module):
    """Two user cells stepped inside one loop from zero states."""

    def __init__(self, gated: bool) -> None:
        super().__init__()
        self.cells = nn.ModuleList([UserElman(IN, gated), UserElman(H, gated)])

    def forward(self, x: torch.Tensor) -> Any:
        h = [torch.zeros(x.size(0), H) for _ in self.cells]
        outs = []
        for t in range(x.size(1)):
            inp = x[:, t]
            for i, cell in enumerate(self.cells):
                h[i] = cell(inp, h[i])
                inp = h[i]
            outs.append(inp)
        return torch.stack(outs, 1)


@pytest.mark.parametrize(("gated", "op"), [(False, "RNN"), (True, "Scan")])
def test_user_cell_layers_in_one_loop(gated: bool, op: str) -> None:
    m = randomize(UserLayers(gated), seed=9)
    model = export(m)
    assert _ops(model).count(op) == 2, _ops(model)
    _same_as_torch(m, model)


class Between(nn.Module):
    """What sits between layers inside the loop: ``"dropout"`` (nn.Dropout, identity in eval
    mode per the torch docs), ``"functional"`` (F.dropout with training=False), ``"residual"``
    (``inp = inp + h[l]``, then ``inp * 0.5``): each only reads values of the same step."""

    def __init__(self, between: str, layers: int) -> None:
        super().__init__()
        self.between = between
        self.cells = nn.ModuleList([nn.LSTMCell(H, H) for _ in range(layers)])
        self.drop = nn.Dropout(0.3)

    def step_input(self, inp: torch.Tensor, h: torch.Tensor) -> torch.Tensor:
        if self.between == "dropout":
            return self.drop(h)
        if self.between == "functional":
            return nn.functional.dropout(h, 0.3, self.training)
        return (inp + h) * 0.5

    def forward(self, x: torch.Tensor) -> Any:
        h = [torch.zeros(x.size(0), H) for _ in self.cells]
        c = [torch.zeros(x.size(0), H) for _ in self.cells]
        outs = []
        for t in range(x.size(1)):
            inp = x[:, t]
            for i, cell in enumerate(self.cells):
                h[i], c[i] = cell(inp, (h[i], c[i]))
                inp = self.step_input(inp, h[i])
            outs.append(inp)
        return torch.stack(outs, 1)


def _xh(n: int, t: int) -> np.ndarray:
    return np.random.default_rng(10 * t + n).normal(size=(n, t, H)).astype(np.float32)


@pytest.mark.parametrize("layers", [2, 3])
@pytest.mark.parametrize("between", ["dropout", "functional", "residual"])
def test_same_step_ops_between_layers(between: str, layers: int) -> None:
    m = randomize(Between(between, layers), seed=11).eval()
    model = export(m)
    assert _ops(model).count("LSTM") == layers, _ops(model)
    for n, t in LENGTHS:
        x = _xh(n, t)
        want = torch_outputs(m, {"x": x})  # reference: PyTorch's own forward (eval mode)
        worst(want, run_onnx(model, {"x": x}))
        if between == "residual":  # reference: onnx's own evaluator on the same file
            worst(want, ReferenceEvaluator(model).run(None, {"x": x}))


class ResidualFromBefore(Between):
    """Near miss: the residual adds the PREVIOUS step's input of the layer (kept across steps)."""

    def forward(self, x: torch.Tensor) -> Any:
        h = [torch.zeros(x.size(0), H) for _ in self.cells]
        c = [torch.zeros(x.size(0), H) for _ in self.cells]
        prev = torch.zeros(x.size(0), H)
        outs = []
        for t in range(x.size(1)):
            inp = x[:, t]
            h[0], c[0] = self.cells[0](inp, (h[0], c[0]))
            h[1], c[1] = self.cells[1](h[0] + prev, (h[1], c[1]))
            prev = h[0]
            outs.append(h[1])
        return torch.stack(outs, 1)


def test_a_residual_from_the_step_before_is_refused() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(ResidualFromBefore("residual", 2)).eval())
    assert e.value.exit_code == 3
    assert "cells.0 (LSTMCell)" in str(e.value) and "read by" in str(e.value), str(e.value)


class TimeMajorGRU(nn.Module):
    """Time-major input (``x[t]``), GRU states starting as None (zeros per the torch docs), eval
    F.dropout between the layers, outputs stacked along axis 0 with ``dim=0``."""

    def __init__(self) -> None:
        super().__init__()
        self.cells = _cells("gru", 2)

    def forward(self, x: torch.Tensor) -> Any:
        h: list[Any] = [None, None]
        outs = []
        for t in range(x.size(0)):
            inp = x[t]
            for i, cell in enumerate(self.cells):
                h[i] = cell(inp, h[i])
                inp = nn.functional.dropout(h[i], 0.2, False)
            outs.append(inp)
        return torch.stack(outs, dim=0)


def test_time_major_gru_layers_from_none_states() -> None:
    m = randomize(TimeMajorGRU(), seed=12)
    model = export(m)
    assert _ops(model).count("GRU") == 2, _ops(model)
    for n, t in LENGTHS:
        x = np.ascontiguousarray(_x(n, t).transpose(1, 0, 2))
        want = torch_outputs(m, {"x": x})  # reference: PyTorch's own forward
        worst(want, run_onnx(model, {"x": x}))
        worst(want, ReferenceEvaluator(model).run(None, {"x": x}))  # reference: onnx's evaluator


class PeeledUserCell(nn.Module):
    """A user cell whose first call has no state: h = tanh(W x + h0); later h' = tanh(W x + U h) ·
    sigmoid(W x) (no published cell: a Scan after the peeled first step)."""

    def __init__(self, size_in: int) -> None:
        super().__init__()
        self.input_size = size_in  # how seqgate infers the loop input's feature size
        self.W, self.U = nn.Linear(size_in, H), nn.Linear(H, H, bias=False)
        self.h0 = nn.Parameter(torch.zeros(H))

    def forward(self, x: torch.Tensor, h: torch.Tensor | None = None) -> torch.Tensor:
        if h is None:
            return torch.tanh(self.W(x) + self.h0)
        return torch.tanh(self.W(x) + self.U(h)) * torch.sigmoid(self.W(x))


class PeeledLayers(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.cells = nn.ModuleList([PeeledUserCell(IN), PeeledUserCell(H)])

    def forward(self, x: torch.Tensor) -> Any:
        h: list[Any] = [None, None]
        outs = []
        for t in range(x.size(1)):
            inp = x[:, t]
            for i, cell in enumerate(self.cells):
                h[i] = cell(inp) if h[i] is None else cell(inp, h[i])
                inp = h[i]
            outs.append(inp)
        return torch.stack(outs, 1)


def test_user_cells_with_a_peeled_first_step_in_one_loop() -> None:
    m = randomize(PeeledLayers(), seed=13)
    model = export(m)
    assert _ops(model).count("If") == 2 and op_types(model.graph).count("Scan") == 2, _ops(model)
    _same_as_torch(m, model)


class ScaledSteps(nn.Module):
    """One cell; each step's collected output is ``h * 2 + x[:, t]`` (same-step elementwise ops),
    or ``lin(h)`` (a layer inside the loop, ``mode="linear"``: still refused)."""

    def __init__(self, mode: str) -> None:
        super().__init__()
        self.mode = mode
        self.cell, self.lin = nn.GRUCell(H, H), nn.Linear(H, H)

    def forward(self, x: torch.Tensor) -> Any:
        h = torch.zeros(x.size(0), H)
        outs = []
        for t in range(x.size(1)):
            h = self.cell(x[:, t], h)
            outs.append(h * 2 + x[:, t] if self.mode == "elementwise" else self.lin(h))
        return torch.stack(outs, 1)


def test_same_step_elementwise_outputs_of_one_cell_fold() -> None:
    m = randomize(ScaledSteps("elementwise"), seed=14)
    model = export(m)
    assert _ops(model).count("GRU") == 1, _ops(model)
    for n, t in LENGTHS:
        x = _xh(n, t)
        worst(torch_outputs(m, {"x": x}), run_onnx(model, {"x": x}))  # reference: PyTorch's forward


def test_a_layer_applied_to_each_step_inside_the_loop_is_still_refused() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(ScaledSteps("linear")))
    assert e.value.exit_code == 3 and "read by lin" in str(e.value), str(e.value)
