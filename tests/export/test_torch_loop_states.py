"""A hand-written cell stepped in a Python loop whose state is changed between steps.

Such a loop is not ``state = cell(x[:, t], state)``: the refusal names the cell and the op the
state goes through, and the traces at the two sample sizes treat the wrapping modules alike
(they used to differ, one keeping the layer whole, the other unrolled). The rewrite the message
suggests (the normalisation inside the cell) exports as one Scan, checked against PyTorch's own
forward (torch's eager kernels).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
import torch
from torch import nn

from seqgate.errors import UnsupportedModelError
from torch_models import export, rand, randomize, run_onnx, torch_outputs, worst


class Cell(nn.Module):
    def __init__(self, n_in: int, hidden: int, norm: bool = False) -> None:
        super().__init__()
        self.ih = nn.Linear(n_in, 2 * hidden)
        self.hh = nn.Linear(hidden, 2 * hidden)
        self.norm = nn.LayerNorm(hidden) if norm else None

    def forward(self, x: torch.Tensor, h: torch.Tensor, c: torch.Tensor) -> Any:
        a, b = (self.ih(x) + self.hh(h)).chunk(2, dim=1)
        c = torch.sigmoid(a) * c + torch.tanh(b)
        h = torch.tanh(c)
        if self.norm is not None:
            h = self.norm(h)
        return h, c


class Layer(nn.Module):
    """Time-major loop; ``norm_outside`` applies a LayerNorm to the state between steps."""

    def __init__(self, norm_outside: bool) -> None:
        super().__init__()
        self.cell = Cell(3, 4, norm=not norm_outside)
        self.norm = nn.LayerNorm(4) if norm_outside else None

    def forward(self, x: torch.Tensor, h: Any = None, c: Any = None) -> Any:
        seq_len, batch, _ = x.size()
        if h is None or c is None:
            h = torch.zeros((batch, 4))
            c = torch.zeros((batch, 4))
        outs = []
        for t in range(seq_len):
            h, c = self.cell(x[t], h, c)
            if self.norm is not None:
                h = self.norm(h)
            outs.append(h)
        return torch.stack(outs), (h, c)


class Net(nn.Module):
    def __init__(self, norm_outside: bool) -> None:
        super().__init__()
        self.layer = Layer(norm_outside)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.layer(x)[0]


def test_state_changed_between_steps_is_refused_naming_the_cell_and_the_op() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(Net(norm_outside=True)), ["x:time,batch,3"])
    msg = str(e.value)
    assert e.value.exit_code == 3
    assert "layer.cell (Cell) runs once per time step" in msg, msg
    assert "it comes from layer.norm (LayerNorm)" in msg and "h = self.norm(h)" in msg, msg


def test_the_suggested_rewrite_exports_as_one_scan(rng: np.random.Generator) -> None:
    m = randomize(Net(norm_outside=False))
    model = export(m, ["x:time,batch,3"])
    assert [n.op_type for n in model.graph.node].count("Scan") == 1
    for shape in ((1, 2, 3), (9, 4, 3)):
        feeds = {"x": rand(rng, *shape)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))
