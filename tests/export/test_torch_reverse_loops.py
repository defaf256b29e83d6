"""Hand-written loops of a built-in cell that run from the last step to the first
(``for t in reversed(range(T))``, the backward half of a hand-written bidirectional model).

Such a loop is ONNX's ``direction="reverse"`` (ONNX operator spec, LSTM/GRU/RNN: the reverse
direction reads the sequence from its last step and its ``Y`` stays in time order), so it exports
as one native node; outputs collected in the loop's own order are flipped back.
References: PyTorch's own forward (eager kernels) through onnxruntime and
``onnx.reference.ReferenceEvaluator``; tolerance ``1e-4 + 1e-4·|ref|`` (``torch_models.worst``).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import onnx
import pytest
import torch
from onnx.reference import ReferenceEvaluator
from torch import nn

from seqgate.errors import UnsupportedModelError
from torch_models import cli_export_verify, export, randomize, run_onnx, torch_outputs, worst

torch.set_num_threads(1)
IN, H = 3, 4
CELLS = {"lstm": nn.LSTMCell, "gru": nn.GRUCell, "rnn": nn.RNNCell}


def _step(cell: nn.Module, kind: str, x_t: torch.Tensor, s: Any) -> tuple[Any, torch.Tensor]:
    s = cell(x_t, s)
    return s, (s[0] if kind == "lstm" else s)


class BiLoop(nn.Module):
    """A forward loop and a reverse loop over the same input; ``turn`` = "reverse" turns the
    backward outputs back with ``list.reverse()``, "cat" collects them with unsqueeze + cat after
    ``outs[::-1]``, "none" keeps the loop's own (reverse-time) order."""

    def __init__(self, kind: str, turn: str) -> None:
        super().__init__()
        self.kind, self.turn = kind, turn
        self.fw, self.bw = CELLS[kind](IN, H), CELLS[kind](IN, H)

    def forward(self, x: torch.Tensor) -> Any:
        s: Any = None
        fo = []
        for t in range(x.size(1)):
            s, h = _step(self.fw, self.kind, x[:, t], s)
            fo.append(h)
        sb: Any = None
        bo = []
        for t in reversed(range(x.size(1))):
            sb, h = _step(self.bw, self.kind, x[:, t], sb)
            bo.append(h)
        if self.turn == "reverse":
            bo.reverse()
            back = torch.stack(bo, 1)
        elif self.turn == "cat":
            back = torch.cat([h.unsqueeze(1) for h in bo[::-1]], 1)
        else:
            back = torch.stack(bo, 1)
        return torch.cat([torch.stack(fo, 1), back], -1), sb


def _directions(model: Any) -> list[str]:
    out = []
    for n in model.graph.node:
        if n.op_type in ("LSTM", "GRU", "RNN"):
            d = [a.s.decode() for a in n.attribute if a.name == "direction"]
            out.append(d[0] if d else "forward")
    return out


@pytest.mark.parametrize("kind", ["lstm", "gru", "rnn"])
@pytest.mark.parametrize("turn", ["reverse", "cat", "none"])
def test_reverse_loop_is_one_reverse_native_node(kind: str, turn: str) -> None:
    m = randomize(BiLoop(kind, turn), seed=4).eval()
    model = export(m, inputs=["x:batch,time,3"])
    onnx.checker.check_model(model)
    assert sorted(_directions(model)) == ["forward", "reverse"], _directions(model)
    for n, t in ((1, 1), (2, 2), (3, 7)):
        x = np.random.default_rng(10 * t + n).normal(size=(n, t, IN)).astype(np.float32)
        want = torch_outputs(m, {"x": x})  # reference: PyTorch's forward
        worst(want, run_onnx(model, {"x": x}))
        worst(want, ReferenceEvaluator(model).run(None, {"x": x}))  # reference: onnx's own evaluator


class UserCell(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.lin = nn.Linear(IN + H, H)

    def forward(self, x: torch.Tensor, h: torch.Tensor) -> torch.Tensor:
        return torch.tanh(self.lin(torch.cat([x, h], -1))) * 0.5 + h * 0.5


class ReverseUser(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.cell = UserCell()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = torch.zeros(x.size(0), H)
        outs = []
        for t in reversed(range(x.size(1))):
            h = self.cell(x[:, t], h)
            outs.append(h)
        return torch.stack(outs, 1)


def test_reverse_loop_over_a_user_cell_is_refused_with_the_way_round() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(ReverseUser(), seed=1).eval(), inputs=["x:batch,time,3"])
    assert e.value.exit_code == 3
    assert "from the last step to the first" in str(e.value) and "torch.flip" in str(e.value), str(e.value)


FACTORY = """
import torch
from torch import nn


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.bw = nn.GRUCell(3, 5)

    def forward(self, x):
        h = torch.zeros(x.size(0), 5)
        outs = []
        for t in reversed(range(x.size(1))):
            h = self.bw(x[:, t], h)
            outs.append(h)
        outs.reverse()
        return torch.stack(outs, 1)


def make():
    return Net()
"""


def test_cli_export_and_verify_compare_the_reverse_loops_step_states(tmp_path: Any) -> None:
    names = cli_export_verify(tmp_path, FACTORY)
    assert {"bw/reverse/hidden_sequence", "bw/reverse/hidden_final"} <= names, names
