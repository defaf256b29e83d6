"""A user cell that returns its output beside its state (``return h, (h, c)``) and whose first call
gets its state in another shape (``[1, batch, H]``, squeezed by the cell) than later calls.

The collected ``out`` of ``out, hidden = cell(x_t, hidden)`` is the same tensor as the carried
``h``: the loop must still be recognised (a native LSTM node when the step is the LSTM), and an
output that is NOT a carried state must be collected by the Scan. A first state of another shape
is exported by peeling the first step.

References: PyTorch's own forward of each module (eager kernels), run through onnxruntime and
``onnx.reference.ReferenceEvaluator``; tolerance ``1e-4 + 1e-4·|ref|`` (``torch_models.worst``).
The step is the LSTM with a forget gate (Gers, Schmidhuber & Cummins 2000), gates in PyTorch's
order i, f, g, o (torch.nn.LSTM docs).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch
from onnx.reference import ReferenceEvaluator
from torch import nn

from torch_models import export, op_types, randomize, run_onnx, torch_outputs, worst

torch.set_num_threads(1)
IN, H = 3, 4
LENGTHS = ((1, 1), (2, 2), (3, 7))  # (batch, T)


class PairCell(nn.Module):
    """LSTM step returning ``(h, (h, c))``; with ``lead`` it takes states [1, batch, H] or
    [batch, H] (``reshape``, as library cells drop a leading axis), and ``scale`` ≠ 1 makes the
    returned output differ from the carried h."""

    def __init__(self, lead: bool, scale: float = 1.0) -> None:
        super().__init__()
        self.lead = lead
        self.w_ih = nn.Parameter(torch.zeros(4 * H, IN))
        self.w_hh = nn.Parameter(torch.zeros(4 * H, H))
        self.b = nn.Parameter(torch.zeros(4 * H))
        self.scale = scale

    def forward(self, x: torch.Tensor, hidden: Any) -> Any:
        h, c = hidden
        if self.lead:
            h, c = h.reshape(-1, H), c.reshape(-1, H)
        g = torch.matmul(x, self.w_ih.t()) + torch.matmul(h, self.w_hh.t()) + self.b
        i, f, gg, o = g.chunk(4, 1)
        c = torch.sigmoid(f) * c + torch.sigmoid(i) * torch.tanh(gg)
        h = torch.sigmoid(o) * torch.tanh(c)
        out = h if self.scale == 1.0 else h * self.scale
        return out, (h, c)


class PairLoop(nn.Module):
    """``out, hidden = cell(x[:, t], hidden)`` from zeros of shape [1, batch, H] (``lead=True``) or
    [batch, H]; returns the collected outputs and the final cell state."""

    def __init__(self, lead: bool, scale: float = 1.0) -> None:
        super().__init__()
        self.lead = lead
        self.cell = PairCell(lead, scale)

    def forward(self, x: torch.Tensor) -> Any:
        z = torch.zeros(1, x.size(0), H) if self.lead else torch.zeros(x.size(0), H)
        hidden = (z, z)
        outs = []
        for t in range(x.size(1)):
            out, hidden = self.cell(x[:, t], hidden)
            outs.append(out)
        return torch.stack(outs, 1), hidden[1]


def _same_as_torch(m: nn.Module, model: Any, reference: bool = True) -> None:
    for n, t in LENGTHS:
        x = np.random.default_rng(10 * t + n).normal(size=(n, t, IN)).astype(np.float32)
        want = torch_outputs(m, {"x": x})  # reference: PyTorch's forward
        worst(want, run_onnx(model, {"x": x}))
        if reference:  # onnx.reference's Scan runs only over axis 0
            worst(want, ReferenceEvaluator(model).run(None, {"x": x}))  # reference: onnx's own evaluator


def test_output_that_is_the_carried_h_gives_the_native_lstm() -> None:
    m = randomize(PairLoop(False), seed=3).eval()
    model = export(m, inputs=["x:batch,time,3"])
    ops = op_types(model.graph)
    assert ops.count("LSTM") == 1 and not {"Scan", "If"} & set(ops), ops  # the step is the LSTM
    _same_as_torch(m, model)


def test_first_state_of_another_shape_is_peeled() -> None:
    m = randomize(PairLoop(True), seed=3).eval()
    model = export(m, inputs=["x:batch,time,3"])
    assert "If" in op_types(model.graph)  # step 0 on its own, steps 1.. in the If's branch
    _same_as_torch(m, model, reference=False)


def test_output_other_than_a_state_is_collected_by_the_scan() -> None:
    m = randomize(PairLoop(True, scale=2.0), seed=4).eval()
    model = export(m, inputs=["x:batch,time,3"])
    ops = op_types(model.graph)
    assert "Scan" in ops and "LSTM" not in ops, ops
    _same_as_torch(m, model, reference=False)
    # the collected output really is 2·h: a copy that collected h instead would be half of it
    x = np.random.default_rng(0).normal(size=(2, 5, IN)).astype(np.float32)
    seq_torch = torch_outputs(m, {"x": x})[0]
    seq_h = torch_outputs(randomize(PairLoop(True, scale=1.0), seed=4).eval(), {"x": x})[0]
    np.testing.assert_allclose(seq_torch, 2.0 * seq_h, rtol=1e-6)  # the test's premise


def test_t_of_a_matrix_and_a_vector() -> None:
    """``Tensor.t()`` (torch docs: 2-D transposed, 1-D returned as is)."""

    class T(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.w = nn.Parameter(torch.zeros(5, IN))
            self.v = nn.Parameter(torch.zeros(5))

        def forward(self, x: torch.Tensor) -> torch.Tensor:
            return torch.matmul(x, self.w.t()) + self.v.t() + torch.t(self.w).sum()

    m = randomize(T(), seed=5).eval()
    model = export(m, inputs=["x:batch,time,3"])
    x = np.random.default_rng(1).normal(size=(2, 6, IN)).astype(np.float32)
    worst(torch_outputs(m, {"x": x}), run_onnx(model, {"x": x}))  # reference: PyTorch's forward
