"""A cell in a Python loop that gets no state on its first call (``state = None`` first).

References: PyTorch's own forward of each module below (torch's eager kernels; the torch docs say a
missing ``hx`` of nn.LSTMCell/GRUCell/RNNCell means zero states), run through onnxruntime and,
where noted, through onnx's own evaluator ``onnx.reference.ReferenceEvaluator``. Tolerance:
``1e-4 + 1e-4·|ref|`` (the project's float32 rule, ``torch_models.worst``). Lengths T = 1, 2, 5,
17 at batch sizes 1 to 3: T = 1 has no step after the peeled first one.
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
LENGTHS = ((1, 1), (2, 2), (3, 5), (2, 17))  # (batch, T)
CELLS = {"lstm": nn.LSTMCell, "gru": nn.GRUCell, "rnn": nn.RNNCell}


def _x(n: int, t: int, seed: int = 0, time_major: bool = False) -> np.ndarray:
    x = np.random.default_rng(seed + 10 * t + n).normal(size=(n, t, IN)).astype(np.float32)
    return np.ascontiguousarray(x.transpose(1, 0, 2)) if time_major else x


def _same_as_torch(m: nn.Module, model: Any, reference: bool = False, time_major: bool = False) -> None:
    """onnxruntime (and ``onnx.reference`` when asked) agree with the module's own forward."""
    for n, t in LENGTHS:
        x = _x(n, t, time_major=time_major)
        want = torch_outputs(m, {"x": x})  # reference: PyTorch's forward
        worst(want, run_onnx(model, {"x": x}))
        if reference:  # reference: onnx's own evaluator on the same file
            worst(want, ReferenceEvaluator(model).run(None, {"x": x}))


# ----- built-in cells: a missing hx is zeros (PyTorch docs) ------------------------------------
class BuiltinLoop(nn.Module):
    """``state = None; state = cell(x[:, t], state)`` (``form="var"``) or ``cell(x[:, t], None if
    t == 0 else state)`` (``form="t0"``); returns the collected h and the final state."""

    def __init__(self, kind: str, form: str) -> None:
        super().__init__()
        self.kind, self.form = kind, form
        self.cell = CELLS[kind](IN, H)

    def forward(self, x: torch.Tensor) -> Any:
        state: Any = None
        outs = []
        for t in range(x.size(1)):
            if self.form == "var":
                state = self.cell(x[:, t], state)
            else:
                state = self.cell(x[:, t], None if t == 0 else state)
            outs.append(state[0] if self.kind == "lstm" else state)
        return torch.stack(outs, 1), state


@pytest.mark.parametrize("kind", ["lstm", "gru", "rnn"])
@pytest.mark.parametrize("form", ["var", "t0"])
def test_builtin_cell_without_a_first_state_is_one_native_node(kind: str, form: str) -> None:
    m = randomize(BuiltinLoop(kind, form), seed=1)
    model = export(m)
    ops = op_types(model.graph)
    assert ops.count(kind.upper()) == 1 and not {"If", "Scan", "Loop"} & set(ops), ops
    # onnx.reference knows LSTM/GRU and a Tanh RNN (FACTS.md), all used here with default activations
    _same_as_torch(m, model, reference=True)


class HcUnpacked(nn.Module):
    """``h, c = cell(x[:, t], None if t == 0 else (h, c))``."""

    def __init__(self) -> None:
        super().__init__()
        self.cell = nn.LSTMCell(IN, H)

    def forward(self, x: torch.Tensor) -> Any:
        outs = []
        for t in range(x.size(1)):
            h, c = self.cell(x[:, t], None if t == 0 else (h, c))  # noqa: F821 - bound at t == 0
            outs.append(h)
        return torch.stack(outs, 1), c


def test_lstm_cell_with_h_c_unpacked_and_none_at_step_zero() -> None:
    m = randomize(HcUnpacked(), seed=2)
    model = export(m)
    assert op_types(model.graph).count("LSTM") == 1
    _same_as_torch(m, model)


class StackedLayers(nn.Module):
    """Two layers, each a loop from ``states[l] = None``; layer 2 loops over layer 1's outputs."""

    def __init__(self, kind: str) -> None:
        super().__init__()
        self.kind = kind
        self.cells = nn.ModuleList([CELLS[kind](IN, H), CELLS[kind](H, H)])

    def forward(self, x: torch.Tensor) -> Any:
        states: list[Any] = [None, None]
        for k, cell in enumerate(self.cells):
            outs = []
            for t in range(x.size(1)):
                states[k] = cell(x[:, t], states[k])
                outs.append(states[k][0] if self.kind == "lstm" else states[k])
            x = torch.stack(outs, 1)
        return x


@pytest.mark.parametrize("kind", ["lstm", "gru"])
def test_stacked_two_layer_loops_from_a_list_of_none_states(kind: str) -> None:
    m = randomize(StackedLayers(kind), seed=3)
    model = export(m)
    assert op_types(model.graph).count(kind.upper()) == 2
    _same_as_torch(m, model)


class Interleaved(nn.Module):
    """Both layers stepped inside one loop over time: layer 2 reads layer 1's step output."""

    def __init__(self) -> None:
        super().__init__()
        self.cells = nn.ModuleList([nn.LSTMCell(IN, H), nn.LSTMCell(H, H)])

    def forward(self, x: torch.Tensor) -> Any:
        states: list[Any] = [None, None]
        outs = []
        for t in range(x.size(1)):
            inp = x[:, t]
            for k, cell in enumerate(self.cells):
                states[k] = cell(inp, states[k])
                inp = states[k][0]
            outs.append(inp)
        return torch.stack(outs, 1)


def test_layers_interleaved_in_one_loop_are_one_lstm_node_each() -> None:
    # layer 2 at step t reads only its own step t-1 and layer 1's step t: two consecutive loops
    m = randomize(Interleaved(), seed=4)
    model = export(m)
    assert op_types(model.graph).count("LSTM") == 2
    _same_as_torch(m, model, reference=True)


# ----- user cells: the first step is peeled ---------------------------------------------------
class ZerosLSTM(nn.Module):
    """An LSTM cell (Hochreiter & Schmidhuber 1997 with forget gate) starting from zeros."""

    def __init__(self) -> None:
        super().__init__()
        self.input_size = IN
        self.ih = nn.Linear(IN, 4 * H)
        self.hh = nn.Linear(H, 4 * H, bias=False)

    def forward(self, x: torch.Tensor, state: Any = None) -> Any:
        if state is None:
            z = torch.zeros(x.size(0), H)
            state = (z, z)
        h, c = state
        i, f, g, o = (self.ih(x) + self.hh(h)).chunk(4, 1)
        c = torch.sigmoid(f) * c + torch.sigmoid(i) * torch.tanh(g)
        return torch.sigmoid(o) * torch.tanh(c), c


class LearnedStartLSTM(ZerosLSTM):
    """The same step; without a state it starts from a learned h0 and ``c0 = tanh(W x_0 + b)``."""

    def __init__(self) -> None:
        super().__init__()
        self.h0 = nn.Parameter(torch.zeros(1, H))
        self.w0 = nn.Linear(IN, H)

    def forward(self, x: torch.Tensor, state: Any = None) -> Any:
        if state is None:
            state = (self.h0.expand(x.size(0), -1), torch.tanh(self.w0(x)))
        return super().forward(x, state)


class InputStartMGU(nn.Module):
    """Minimal gated unit (Zhou et al. 2016, not an LSTM/GRU/RNN: a Scan); ``h0 = tanh(W x_0)``."""

    def __init__(self) -> None:
        super().__init__()
        self.input_size = IN
        self.f = nn.Linear(IN + H, H)
        self.c = nn.Linear(IN + H, H)
        self.w0 = nn.Linear(IN, H)

    def forward(self, x: torch.Tensor, h: Any = None) -> Any:
        if h is None:
            h = torch.tanh(self.w0(x))
        f = torch.sigmoid(self.f(torch.cat([x, h], 1)))
        cand = torch.tanh(self.c(torch.cat([x, f * h], 1)))
        return (1 - f) * h + f * cand


class UserLoop(nn.Module):
    """``state = None; for t: state = cell(x_t, state)``; batch-first or time-major (``x[t]``)."""

    def __init__(self, cell: nn.Module, time_major: bool = False) -> None:
        super().__init__()
        self.cell, self.time_major = cell, time_major
        self.pair = isinstance(cell, ZerosLSTM)  # the cell returns (h, c)

    def forward(self, x: torch.Tensor) -> Any:
        state: Any = None
        outs = []
        for t in range(x.size(0 if self.time_major else 1)):
            state = self.cell(x[t] if self.time_major else x[:, t], state)
            outs.append(state[0] if self.pair else state)
        return torch.stack(outs, 0 if self.time_major else 1), state


def _peeled(model: Any, loop_op: str) -> None:
    """One If at the top; its T > 1 branch holds the loop as ``loop_op``."""
    top = [n.op_type for n in model.graph.node]
    assert top.count("If") == 1 and not {"LSTM", "GRU", "RNN", "Scan"} & set(top), top
    assert op_types(model.graph).count(loop_op) == 1, op_types(model.graph)


def test_user_lstm_cell_starting_from_zeros_loops_as_a_native_lstm() -> None:
    m = randomize(UserLoop(ZerosLSTM()), seed=4)
    model = export(m)
    _peeled(model, "LSTM")  # the later step is proven an LSTM (core.cellmatch)
    _same_as_torch(m, model, reference=True)


def _zeros_start_differs(m: UserLoop, x: np.ndarray) -> None:
    """The module's output is not that of the same step started from zeros (so a zeros start would
    fail the comparison): reference the module's own forward."""
    cell = m.cell
    with torch.no_grad():
        xt = torch.from_numpy(x)
        z = torch.zeros(x.shape[0], H)
        h = ZerosLSTM.forward(cell, xt[:, 0], (z, z)) if isinstance(cell, ZerosLSTM) else (
            InputStartMGU.forward(cell, xt[:, 0], z))
        got = m(xt)[0][:, 0]
    first = h[0] if isinstance(h, tuple) else h
    assert float((first - got).abs().max()) > 1e-2


@pytest.mark.parametrize("cell, loop_op", [(LearnedStartLSTM, "LSTM"), (InputStartMGU, "Scan")])
def test_user_cell_with_a_non_zero_start_is_exact_through_the_peeled_step(cell: type, loop_op: str) -> None:
    m = randomize(UserLoop(cell()), seed=5)
    _zeros_start_differs(m, _x(2, 3))
    model = export(m)
    _peeled(model, loop_op)
    _same_as_torch(m, model, reference=loop_op == "LSTM")


def test_time_major_scan_after_a_peeled_step_agrees_with_onnx_reference() -> None:
    # onnx.reference runs Scan only over axis 0 (its own limit), so this loop is time-major
    m = randomize(UserLoop(InputStartMGU(), time_major=True), seed=6)
    model = export(m, ["x:time,batch,3"])
    _peeled(model, "Scan")
    _same_as_torch(m, model, reference=True, time_major=True)


class FirstCallShorter(nn.Module):
    """``h = cell(x[:, 0])`` then ``h = cell(x[:, t], h)``: the first call passes fewer arguments."""

    def __init__(self) -> None:
        super().__init__()
        self.cell = InputStartMGU()

    def forward(self, x: torch.Tensor) -> Any:
        h = self.cell(x[:, 0])
        outs = [h]
        for t in range(1, x.size(1)):
            h = self.cell(x[:, t], h)
            outs.append(h)
        return torch.stack(outs, 1)


def test_a_first_call_with_fewer_arguments_is_peeled() -> None:
    m = randomize(FirstCallShorter(), seed=7)
    model = export(m)
    _peeled(model, "Scan")
    _same_as_torch(m, model)


class NoneParts(ZerosLSTM):
    """Takes ``(None, None)`` as "no state"."""

    def forward(self, x: torch.Tensor, state: Any = None) -> Any:
        h, c = state
        if h is None:
            h = c = torch.zeros(x.size(0), H)
        return super().forward(x, (h, c))


class PairOfNones(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.cell = NoneParts()

    def forward(self, x: torch.Tensor) -> Any:
        outs = []
        for t in range(x.size(1)):
            h, c = self.cell(x[:, t], (None, None) if t == 0 else (h, c))  # noqa: F821 - bound at t == 0
            outs.append(h)
        return torch.stack(outs, 1), c


def test_a_first_state_that_cannot_be_traced_is_refused_naming_the_cell() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(PairOfNones()))
    assert e.value.exit_code == 3
    assert "first call of cell passes 'state'" in str(e.value), str(e.value)


FACTORY = """
import torch
from torch import nn


class Start(nn.Module):
    def __init__(self):
        super().__init__()
        self.input_size = 3
        self.ih = nn.Linear(3, 20)
        self.hh = nn.Linear(5, 20, bias=False)
        self.h0 = nn.Parameter(torch.rand(1, 5) - 0.5)
        self.w0 = nn.Linear(3, 5)

    def forward(self, x, state=None):
        if state is None:
            state = (self.h0.expand(x.size(0), -1), torch.tanh(self.w0(x)))
        h, c = state
        i, f, g, o = (self.ih(x) + self.hh(h)).chunk(4, 1)
        c = torch.sigmoid(f) * c + torch.sigmoid(i) * torch.tanh(g)
        return torch.sigmoid(o) * torch.tanh(c), c


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.enc = Start()
        self.dec = nn.GRUCell(5, 4)
        self.fc = nn.Linear(4, 2)

    def forward(self, x):
        state = None
        outs = []
        for t in range(x.size(1)):
            state = self.enc(x[:, t], state)
            outs.append(state[0])
        y = torch.stack(outs, 1)
        h = None
        hs = []
        for t in range(y.size(1)):
            h = self.dec(y[:, t], h)
            hs.append(h)
        return self.fc(torch.stack(hs, 1))


def make():
    torch.manual_seed(0)
    return Net().eval()
"""


def test_cli_export_and_verify_compare_every_step_of_both_loops(tmp_path: Any) -> None:
    # seqgate verify --synthetic compares each probe with the PyTorch module's own cell calls
    names = cli_export_verify(tmp_path, FACTORY)
    want = {f"{cell}/forward/{kind}" for cell in ("enc", "dec") for kind in ("hidden_sequence", "hidden_final")}
    assert want | {"enc/forward/cell_final"} <= names, names


def test_two_exports_of_a_peeled_loop_are_byte_identical() -> None:
    # project rule (DEVELOPERS.md): deterministic output, names from the builder's scopes
    m = randomize(UserLoop(LearnedStartLSTM()), seed=8)
    assert export(m).SerializeToString() == export(m).SerializeToString()
