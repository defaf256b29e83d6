"""Modules whose forward branches on integer input data the way forecasting libraries' recurrent
wrappers do (lengths checked, then packed), kept out of test files: pytest rewrites the ``assert``
statements of test files into other bytecode."""

from __future__ import annotations

import textwrap

import torch
from torch import nn
from torch.nn.utils.rnn import pack_padded_sequence, pad_packed_sequence


class LengthsGuardedLSTM(nn.Module):
    """lengths.min()/max() read, asserted, branched on, then pack_padded_sequence around an LSTM."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor, lengths: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        min_length = lengths.min()
        max_length = lengths.max()
        assert min_length >= 0
        if max_length == 0:
            out = x.new_zeros(x.size(0), x.size(1), 4)
            h = x.new_zeros(1, x.size(0), 4)
        else:
            packed = pack_padded_sequence(x, lengths.cpu(), batch_first=True, enforce_sorted=False)
            out, (h, _) = self.lstm(packed)
            out, _ = pad_packed_sequence(out, batch_first=True, total_length=x.size(1))
            if min_length == 0:
                h = torch.where((lengths > 0).view(1, -1, 1), h, torch.zeros_like(h))
        return out, h


class FullOfSize(nn.Module):
    """Lengths built from a size (every row the full window), then a branch on them."""

    def __init__(self) -> None:
        super().__init__()
        self.gru = nn.GRU(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        lengths = torch.full((x.size(0),), x.size(1))
        if lengths.max() == 0:
            return x.new_zeros(x.size(0), 4)
        return self.gru(x)[0][:, -1]


class CombinedConditions(nn.Module):
    """Clamped, shifted, cast lengths; a condition joined with `&` and `torch.all`."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor, lengths: torch.Tensor) -> torch.Tensor:
        shifted = (lengths.clamp(min=0) - 1).long()
        ok = (shifted >= 0) & (lengths.cpu() > 0)
        if not torch.all(ok):
            return x.sum(-1)
        if (-shifted).amax().item() > 0:
            return x.mean(-1)
        return self.lstm(x)[0][..., 0]


class MeanBranch(nn.Module):
    """A branch through an op without an interval rule (mean): unknown, so refused."""

    def __init__(self) -> None:
        super().__init__()
        self.gru = nn.GRU(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor, lengths: torch.Tensor) -> torch.Tensor:
        if lengths.float().mean() < 0.5:
            return x.new_zeros(x.size(0), 4)
        return self.gru(x)[0][:, -1]


# A factory file for CLI tests: a branch that declared lengths in 1..time decide (line 11: the `if`)
RANGE_GUARDED_NET_SOURCE = textwrap.dedent('''
    import torch
    from torch import nn

    class Net(nn.Module):
        def __init__(self):
            super().__init__()
            self.gru = nn.GRU(3, 4, batch_first=True)

        def forward(self, x, lengths):
            if lengths.max() <= 0:
                return x[:, -1, :1].expand(-1, 4)
            return self.gru(x)[0][:, -1] * lengths.unsqueeze(-1)

    def build():
        torch.manual_seed(5)
        return Net()
''')
