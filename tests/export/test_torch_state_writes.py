"""A forward that writes into the module's own tensors keeps state across calls; one ONNX graph
computes one call from its inputs, so such a module is refused (exit 3) naming the tensor, and
the module's tensors are as they were before the export.

Reference for "the source changes between calls": PyTorch itself — the test calls the module
twice and sees different outputs, which no single constant graph can reproduce.
"""

from __future__ import annotations

import pytest
import torch
from torch import nn

from seqgate.errors import UnsupportedModelError
from torch_models import export


class Counter(nn.Module):
    """Adds a call counter kept in a buffer (``self.calls[0] += 1``) to an LSTM's output."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)
        self.register_buffer("calls", torch.zeros(4))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        self.calls[0] = self.calls[0] + 1.0
        return self.lstm(x)[0] + self.calls


class ReadsBuffer(nn.Module):
    """Reads a buffer without writing it: exported as usual."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)
        self.register_buffer("offset", torch.full((4,), 0.25))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.lstm(x)[0] + self.offset


def test_the_source_really_changes_between_calls() -> None:
    m, x = Counter().eval(), torch.zeros(1, 2, 3)
    with torch.no_grad():
        assert not torch.equal(m(x), m(x))


def test_a_forward_writing_a_buffer_is_refused_and_the_buffer_restored() -> None:
    m = Counter()
    before = m.calls.clone()
    with pytest.raises(UnsupportedModelError, match=r"changes the module's own tensors \(calls\)"):
        export(m, ["x:batch,time,3"])
    assert torch.equal(m.calls, before)


def test_a_forward_reading_a_buffer_exports() -> None:
    m = ReadsBuffer()
    model = export(m, ["x:batch,time,3"])
    assert len(model.graph.node) > 0 and torch.equal(m.offset, torch.full((4,), 0.25))
