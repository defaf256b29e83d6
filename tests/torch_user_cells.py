"""Hand-written PyTorch cells (test fixtures): the published forms and near misses of them.

Every cell keeps its gate weights in separate ``nn.Linear`` layers named after the equations, so
the NumPy references in ``test_cell_recognition`` can read them by name. Each ``make_*`` factory
wraps a cell in ``UserCellOverTime`` (a loop over the input's time axis from zero states).
"""

from __future__ import annotations

from typing import Any

import torch
from torch import nn

from torch_cell_models import IN, H, UserCellOverTime


class _Gates(nn.Module):
    """``W_<g>`` (input, with bias) and ``U_<g>`` (recurrent, no bias) for each gate name."""

    def __init__(self, gates: str) -> None:
        super().__init__()
        self.input_size = IN  # how seqgate infers the loop input's feature size
        for g in gates:
            self.add_module(f"W_{g}", nn.Linear(IN, H))
            self.add_module(f"U_{g}", nn.Linear(H, H, bias=False))

    def pre(self, g: str, x: Any, h: Any) -> Any:
        return getattr(self, f"W_{g}")(x) + getattr(self, f"U_{g}")(h)


class HandLSTM(_Gates):
    """Hochreiter & Schmidhuber (1997) with a forget gate: c' = f c + i g, h' = o tanh(c')."""

    def __init__(self) -> None:
        super().__init__("ifgo")

    def forward(self, x: Any, state: Any) -> Any:
        h, c = state
        i = torch.sigmoid(self.pre("i", x, h))
        f = torch.sigmoid(self.pre("f", x, h))
        g = torch.tanh(self.pre("g", x, h))
        o = torch.sigmoid(self.pre("o", x, h))
        c = f * c + i * g
        return o * torch.tanh(c), c


class HandGRUResetInside(_Gates):
    """Cho et al. (2014): n = tanh(W_n x + U_n (r ⊙ h)), h' = (1 − z) n + z h."""

    def __init__(self) -> None:
        super().__init__("zrn")

    def forward(self, x: Any, h: Any) -> Any:
        z = torch.sigmoid(self.pre("z", x, h))
        r = torch.sigmoid(self.pre("r", x, h))
        n = torch.tanh(self.W_n(x) + self.U_n(r * h))
        return (1 - z) * n + z * h


class HandGRUResetOutside(_Gates):
    """The reset applied after the recurrent matmul: n = tanh(W_n x + r ⊙ (U_n h + b_n))."""

    def __init__(self) -> None:
        super().__init__("zrn")
        self.U_n = nn.Linear(H, H)  # with its own bias b_n, inside the reset product

    def forward(self, x: Any, h: Any) -> Any:
        z = torch.sigmoid(self.pre("z", x, h))
        r = torch.sigmoid(self.pre("r", x, h))
        n = torch.tanh(self.W_n(x) + r * self.U_n(h))
        return (1 - z) * n + z * h


class HandElman(_Gates):
    """Elman (1990): h' = tanh(W x + U h)."""

    def __init__(self) -> None:
        super().__init__("h")

    def forward(self, x: Any, h: Any) -> Any:
        return torch.tanh(self.pre("h", x, h))


class OutputPeepholeOnOldCell(HandLSTM):
    """Near miss: the output gate's peephole reads c_{t−1} (Gers & Schmidhuber: o sees c_t)."""

    def __init__(self) -> None:
        super().__init__()
        self.p_o = nn.Parameter(torch.zeros(H))

    def forward(self, x: Any, state: Any) -> Any:
        h, c = state
        i = torch.sigmoid(self.pre("i", x, h))
        f = torch.sigmoid(self.pre("f", x, h))
        g = torch.tanh(self.pre("g", x, h))
        o = torch.sigmoid(self.pre("o", x, h) + self.p_o * c)
        c = f * c + i * g
        return o * torch.tanh(c), c


class LSTMWithSkip(HandLSTM):
    """Near miss: an extra term, h' = o tanh(c') + V x (a residual from the input)."""

    def __init__(self) -> None:
        super().__init__()
        self.V = nn.Linear(IN, H, bias=False)

    def forward(self, x: Any, state: Any) -> Any:
        h, c = super().forward(x, state)
        return h + self.V(x), c


class GRUUpdateOnCandidate(HandGRUResetInside):
    """Near miss: z weights the candidate, h' = z n + (1 − z) h (not ONNX's (1 − z) n + z h)."""

    def forward(self, x: Any, h: Any) -> Any:
        z = torch.sigmoid(self.pre("z", x, h))
        r = torch.sigmoid(self.pre("r", x, h))
        n = torch.tanh(self.W_n(x) + self.U_n(r * h))
        return z * n + (1 - z) * h


def _make(cell: nn.Module, lstm_like: bool, seed: int) -> nn.Module:
    """Wrap ``cell`` in a loop over time; every parameter U(−0.5, 0.5) from a seeded generator."""
    m = UserCellOverTime(cell, lstm_like)
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for p in m.parameters():
            p.copy_(torch.rand(p.shape, generator=g) - 0.5)
    return m.eval()


def make_hand_lstm() -> nn.Module:
    return _make(HandLSTM(), True, 21)


def make_gru_reset_inside() -> nn.Module:
    return _make(HandGRUResetInside(), False, 22)


def make_gru_reset_outside() -> nn.Module:
    return _make(HandGRUResetOutside(), False, 23)


def make_elman() -> nn.Module:
    return _make(HandElman(), False, 24)


def make_old_cell_output_peephole() -> nn.Module:
    return _make(OutputPeepholeOnOldCell(), True, 25)


def make_lstm_with_skip() -> nn.Module:
    return _make(LSTMWithSkip(), True, 26)


def make_gru_update_on_candidate() -> nn.Module:
    return _make(GRUUpdateOnCandidate(), False, 27)
