"""PyTorch models that run recurrent cells step by step in Python loops (test fixtures).

Each ``make_*`` factory returns a module with seeded random weights; the CLI tests load them
as ``torch_cell_models.py:make_*``. Sizes are small so the NumPy references stay fast.
"""

from __future__ import annotations

from typing import Any

import torch
from torch import nn

IN, H = 3, 5


def _seeded(m: nn.Module, seed: int) -> nn.Module:
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for p in m.parameters():
            p.copy_(torch.rand(p.shape, generator=g) - 0.5)
    return m.eval()


class LSTMCellOverTime(nn.Module):
    """``for t in range(x.size(1))`` with an LSTMCell; sequence, final h and c returned."""

    def __init__(self) -> None:
        super().__init__()
        self.cell = nn.LSTMCell(IN, H)
        self.fc = nn.Linear(H, 2)

    def forward(self, x: Any) -> Any:
        h = x.new_zeros(x.size(0), H)
        c = torch.zeros_like(h)
        outs = []
        for t in range(x.size(1)):
            h, c = self.cell(x[:, t], (h, c))
            outs.append(h)
        return self.fc(torch.stack(outs, 1)), h, c


class GRUCellUnbind(nn.Module):
    """``for x_t in x.unbind(1)`` with a GRUCell; only the last state is used."""

    def __init__(self) -> None:
        super().__init__()
        self.cell = nn.GRUCell(IN, H)
        self.fc = nn.Linear(H, 1)

    def forward(self, x: Any) -> Any:
        h = torch.zeros(x.size(0), H)
        for x_t in x.unbind(1):
            h = self.cell(x_t, h)
        return self.fc(h)


class RNNCellFixedLength(nn.Module):
    """``for t in range(self.seq_len)`` (a fixed length) with a ReLU RNNCell and no initial state."""

    seq_len = 12

    def __init__(self) -> None:
        super().__init__()
        self.cell = nn.RNNCell(IN, H, nonlinearity="relu")

    def forward(self, x: Any) -> Any:
        h = self.cell(x[:, 0])
        outs = [h.unsqueeze(1)]
        for t in range(1, self.seq_len):
            h = self.cell(x[:, t], h)
            outs.append(h.unsqueeze(1))
        return torch.cat(outs, 1)


class Seq2SeqDecoder(nn.Module):
    """LSTM encoder, LSTMCell decoder fed its own prediction for ``horizon`` steps."""

    horizon = 4

    def __init__(self) -> None:
        super().__init__()
        self.enc = nn.LSTM(IN, H, batch_first=True)
        self.dec = nn.LSTMCell(1, H)
        self.out = nn.Linear(H, 1)

    def forward(self, x: Any) -> Any:
        _, (h, c) = self.enc(x)
        h, c = h[0], c[0]
        y = x[:, -1, :1]
        preds = []
        for _ in range(self.horizon):
            h, c = self.dec(y, (h, c))
            y = self.out(h)
            preds.append(y)
        return torch.cat(preds, 1)


class HeadInsideLoop(nn.Module):
    """A near miss: each step's h also feeds a Linear inside the loop (not one recurrent op)."""

    def __init__(self) -> None:
        super().__init__()
        self.cell = nn.LSTMCell(IN, H)
        self.fc = nn.Linear(H, 1)

    def forward(self, x: Any) -> Any:
        h = x.new_zeros(x.size(0), H)
        c = torch.zeros_like(h)
        outs = []
        for t in range(x.size(1)):
            h, c = self.cell(x[:, t], (h, c))
            outs.append(self.fc(h))
        return torch.stack(outs, 1)


class SwappedState(nn.Module):
    """A near miss: the loop feeds the cell (c, h) instead of (h, c)."""

    def __init__(self) -> None:
        super().__init__()
        self.cell = nn.LSTMCell(IN, H)

    def forward(self, x: Any) -> Any:
        h = x.new_zeros(x.size(0), H)
        c = torch.zeros_like(h)
        for t in range(x.size(1)):
            h, c = self.cell(x[:, t], (c, h))
        return h


def make_lstm_loop() -> nn.Module:
    return _seeded(LSTMCellOverTime(), 1)


def make_gru_unbind() -> nn.Module:
    return _seeded(GRUCellUnbind(), 2)


def make_rnn_fixed() -> nn.Module:
    return _seeded(RNNCellFixedLength(), 3)


def make_decoder() -> nn.Module:
    return _seeded(Seq2SeqDecoder(), 4)


def make_head_inside() -> nn.Module:
    return _seeded(HeadInsideLoop(), 5)


def make_swapped() -> nn.Module:
    return _seeded(SwappedState(), 6)


# ----- user-written cells ---------------------------------------------------------------------
class PeepholeLSTMCell(nn.Module):
    """LSTM with peepholes (Gers & Schmidhuber 2000): i, f see c_{t−1}; o sees c_t."""

    def __init__(self, input_size: int, hidden: int) -> None:
        super().__init__()
        self.input_size = input_size
        self.W = nn.Linear(input_size, 4 * hidden)
        self.U = nn.Linear(hidden, 4 * hidden, bias=False)
        self.w_ci = nn.Parameter(torch.zeros(hidden))
        self.w_cf = nn.Parameter(torch.zeros(hidden))
        self.w_co = nn.Parameter(torch.zeros(hidden))

    def forward(self, x: Any, state: Any) -> Any:
        h, c = state
        i, f, g, o = (self.W(x) + self.U(h)).chunk(4, 1)
        i = torch.sigmoid(i + self.w_ci * c)
        f = torch.sigmoid(f + self.w_cf * c)
        c = f * c + i * torch.tanh(g)
        o = torch.sigmoid(o + self.w_co * c)
        return o * torch.tanh(c), c


class MinimalGatedUnit(nn.Module):
    """Minimal gated unit: f = σ(W_f x + U_f h + b), h̃ = tanh(W_h x + U_h (f ⊙ h) + b), h' = (1−f) h + f h̃."""

    def __init__(self, input_size: int, hidden: int) -> None:
        super().__init__()
        self.input_size = input_size
        self.wf = nn.Linear(input_size, hidden)
        self.uf = nn.Linear(hidden, hidden, bias=False)
        self.wh = nn.Linear(input_size, hidden)
        self.uh = nn.Linear(hidden, hidden, bias=False)

    def forward(self, x: Any, h: Any) -> Any:
        f = torch.sigmoid(self.wf(x) + self.uf(h))
        cand = torch.tanh(self.wh(x) + self.uh(f * h))
        return (1 - f) * h + f * cand


class UserCellOverTime(nn.Module):
    """A user cell run over the input's time axis from zero states."""

    def __init__(self, cell: nn.Module, lstm_like: bool) -> None:
        super().__init__()
        self.cell = cell
        self.lstm_like = lstm_like
        self.fc = nn.Linear(H, 1)

    def forward(self, x: Any) -> Any:
        h = x.new_zeros(x.size(0), H)
        c = torch.zeros_like(h)
        outs = []
        for t in range(x.size(1)):
            if self.lstm_like:
                h, c = self.cell(x[:, t], (h, c))
            else:
                h = self.cell(x[:, t], h)
            outs.append(h)
        return self.fc(torch.stack(outs, 1)), h


def make_peephole() -> nn.Module:
    return _seeded(UserCellOverTime(PeepholeLSTMCell(IN, H), True), 7)


def make_mgu() -> nn.Module:
    return _seeded(UserCellOverTime(MinimalGatedUnit(IN, H), False), 8)


class TanhForgetCell(PeepholeLSTMCell):
    """A near miss: the "forget gate" uses tanh, so this is not an LSTM."""

    def forward(self, x: Any, state: Any) -> Any:
        h, c = state
        i, f, g, o = (self.W(x) + self.U(h)).chunk(4, 1)
        i = torch.sigmoid(i + self.w_ci * c)
        f = torch.tanh(f + self.w_cf * c)
        c = f * c + i * torch.tanh(g)
        o = torch.sigmoid(o + self.w_co * c)
        return o * torch.tanh(c), c


def make_tanh_forget() -> nn.Module:
    return _seeded(UserCellOverTime(TanhForgetCell(IN, H), True), 9)
