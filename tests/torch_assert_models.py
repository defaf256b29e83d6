"""Modules whose forward holds ``assert`` statements (kept out of test files, whose asserts pytest
rewrites into other bytecode)."""

from __future__ import annotations

import torch
from torch import nn


class LengthsAssert(nn.Module):
    """The pattern met in forecasting libraries: lengths checked before the recurrent layer."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor, lengths: torch.Tensor) -> torch.Tensor:
        assert lengths.min() > 0, "lengths must be positive"
        assert not x.isnan().any()
        assert x.size(-1) == 3 and x.abs().max() < 1e9
        out, _ = self.lstm(x)
        return out * lengths.unsqueeze(-1).unsqueeze(-1)


class AssertBesideSizeBranch(nn.Module):
    """A size branch (value-carrying trace) and a data assert, and an assert on the batch size."""

    def __init__(self) -> None:
        super().__init__()
        self.gru = nn.GRU(2, 5, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.dim() == 2:
            x = x.unsqueeze(-1).expand(-1, -1, 2)
        out, h = self.gru(x)
        assert h.size() == (1, x.size(0), 5), "state shape"
        assert out.abs().max() <= 1.0
        return out[:, -1]


class EitherAssert(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        assert x.min() > -100 or x.max() < 100
        return self.lstm(x)[0]


class IfRaise(nn.Module):
    """Not an ``assert`` statement: an ``if`` on data that raises is a data branch."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.min() < -100:
            raise AssertionError("too small")
        return self.lstm(x)[0]
