"""Forwards that inspect a value's type — ``isinstance(h, tuple)`` on an LSTM's state, as library
wrappers do to serve both LSTM and GRU.

A traced value is a proxy, not the tuple eager code sees; seqgate hands a recurrent layer's
``(out, (h, c))`` on as a real tuple, and refuses (exit 3) any trace whose outputs differ in
count, shape or dtype from PyTorch's own forward on the same sample input.
References: PyTorch's own forward (eager kernels) through onnxruntime; tolerance
``1e-4 + 1e-4·|ref|`` (``torch_models.worst``).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
import torch
from torch import nn

from seqgate.errors import UnsupportedModelError
from torch_models import export, randomize, run_onnx, torch_outputs, worst

torch.set_num_threads(1)


class EitherState(nn.Module):
    """``h[0] if isinstance(h, tuple) else h``, after a branch on a size (the value-carrying trace)."""

    def __init__(self, kind: str) -> None:
        super().__init__()
        self.rnn = (nn.LSTM if kind == "lstm" else nn.GRU)(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> Any:
        if x.dim() == 2:
            x = x.unsqueeze(0)
        out, h = self.rnn(x)
        return out, (h[0] if isinstance(h, tuple) else h)


class WrappedLSTM(nn.LSTM):
    """A subclass that calls the base forward, as forecasting libraries' wrappers do."""

    def forward(self, x: torch.Tensor, hx: Any = None) -> Any:  # type: ignore[override]
        if x.dim() == 3:
            return super().forward(x, hx)
        raise ValueError("batched input only")


class SubclassState(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.rnn = WrappedLSTM(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> Any:
        out, h = self.rnn(x)
        return out, (h[0] if isinstance(h, tuple) else h)


class NamedPair(nn.Module):
    """``torch.max(x, 1)`` is a named tuple in eager code, a proxy while tracing."""

    def __init__(self) -> None:
        super().__init__()
        self.gru = nn.GRU(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> Any:
        if x.dim() == 2:
            x = x.unsqueeze(0)
        y, _ = self.gru(x)
        r = torch.max(y, 1)
        return r[0] if isinstance(r, tuple) else r


@pytest.mark.parametrize("make", [lambda: EitherState("lstm"), lambda: EitherState("gru"), SubclassState],
                         ids=["lstm", "gru", "subclass"])
def test_isinstance_on_a_recurrent_state_follows_eager(make: Any) -> None:
    m = randomize(make(), seed=2).eval()
    model = export(m, inputs=["x:batch,time,3"])
    assert len(model.graph.output) == 2  # out and h, as eager code returns
    x = np.random.default_rng(0).normal(size=(2, 6, 3)).astype(np.float32)
    worst(torch_outputs(m, {"x": x}), run_onnx(model, {"x": x}))  # reference: PyTorch's forward


def test_a_trace_that_returns_another_structure_is_refused() -> None:
    m = randomize(NamedPair(), seed=2).eval()
    with pytest.raises(UnsupportedModelError) as e:
        export(m, inputs=["x:batch,time,3"])
    text = str(e.value)
    assert "returns 2 value(s)" in text and "returns 1" in text and "isinstance" in text, text
