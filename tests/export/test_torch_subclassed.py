"""nn.LSTM/GRU/RNN subclasses whose own forward calls ``super().forward(...)`` around other ops.

Each export is compared with PyTorch's own forward (torch's eager kernels) and the recurrent
part with a float64 NumPy run of the published LSTM/GRU/RNN equations
(``tests/torch_reference.py``: the equations of the PyTorch nn.LSTM/GRU/RNN documentation).
The probes are checked by ``seqgate verify`` through the CLI, whose PyTorch runner records the
states at the base call (an independent run of the module in PyTorch).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
import torch
from torch import nn
from torch.nn.utils.rnn import pack_padded_sequence, pad_packed_sequence

from seqgate.errors import UnsupportedModelError
from seqgate.onnxfile.probes import read_probe_map
from torch_models import cli_export_verify, export, rand, randomize, run_onnx, torch_outputs, worst
from torch_reference import run_module


class TimeMajorLSTM(nn.LSTM):
    """Takes ``[batch, time, features]`` but runs the base layer time-major."""

    def forward(self, x: torch.Tensor, hx: Any = None) -> Any:  # type: ignore[override]
        out, state = super().forward(x.transpose(0, 1), hx)
        return out.transpose(0, 1), state


class PackingGRU(nn.GRU):
    """Packs by lengths around the base layer and pads back."""

    def forward(self, x: torch.Tensor, lengths: torch.Tensor) -> Any:  # type: ignore[override]
        packed = pack_padded_sequence(x, lengths, batch_first=True, enforce_sorted=False)
        out, h = super().forward(packed)
        out, _ = pad_packed_sequence(out, batch_first=True, total_length=x.size(1))
        return out, h


class OptionalLengthsRNN(nn.RNN):
    """The shape met in forecasting libraries: a packed path when lengths are given, else the base."""

    def forward(self, x: Any, hx: Any = None, lengths: Any = None) -> Any:  # type: ignore[override]
        if isinstance(x, nn.utils.rnn.PackedSequence) or lengths is None:
            return super().forward(x, hx=hx)
        raise NotImplementedError


class Forecaster(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.enc = TimeMajorLSTM(3, 5, num_layers=2)
        self.head = nn.Linear(5, 2)

    def forward(self, x: torch.Tensor) -> Any:
        out, (h, c) = self.enc(x)
        return self.head(out), h, c


class Tagger(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.rnn = PackingGRU(3, 4, num_layers=2, batch_first=True, bidirectional=True)

    def forward(self, x: torch.Tensor, lengths: torch.Tensor) -> Any:
        return self.rnn(x, lengths)


class Plain(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.rnn = OptionalLengthsRNN(3, 6, nonlinearity="relu", batch_first=True)

    def forward(self, x: torch.Tensor) -> Any:
        out, h = self.rnn(x)
        return out[:, -1] * 2.0, h


class ZeroLengthAware(nn.GRU):
    """Branches on the lengths' values before packing: a data branch, refused."""

    def forward(self, x: torch.Tensor, hx: Any = None, lengths: Any = None) -> Any:  # type: ignore[override]
        if lengths is None:
            return super().forward(x, hx)
        if lengths.max() == 0:
            return torch.zeros_like(x), hx
        packed = pack_padded_sequence(x, lengths, batch_first=True, enforce_sorted=False)
        out, h = super().forward(packed, hx)
        return pad_packed_sequence(out, batch_first=True)[0], h


class WithLengths(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.rnn = ZeroLengthAware(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor, lengths: torch.Tensor) -> Any:
        return self.rnn(x, lengths=lengths)[0]


def _params(m: nn.Module) -> dict[str, Any]:
    return {k: v.detach().numpy() for k, v in m.state_dict().items()}


def test_time_major_subclass_matches_torch_and_the_lstm_equations(rng: np.random.Generator) -> None:
    m = randomize(Forecaster())
    model = export(m)
    assert [n.op_type for n in model.graph.node].count("LSTM") == 2
    for shape in ((1, 2, 3), (4, 9, 3)):
        feeds = {"x": rand(rng, *shape)}
        got = run_onnx(model, feeds)
        worst(torch_outputs(m, feeds), got)
        # the base layer is time-major: the subclass transposes in and out
        ref = run_module("lstm", _params(m.enc), feeds["x"], 2, False, True)
        w, bias = m.head.weight.detach().numpy().astype(np.float64), m.head.bias.detach().numpy()
        head = ref["output"] @ w.T + bias
        worst([head, ref["h_n"], ref["c_n"]], got)


def test_packing_subclass_matches_torch_and_the_gru_equations(rng: np.random.Generator) -> None:
    m = randomize(Tagger())
    model = export(m, ["x:batch,time,3", "lengths:batch"])
    x = rand(rng, 3, 7, 3)
    lengths = np.array([7, 3, 5], np.int64)
    feeds = {"x": x, "lengths": lengths}
    got = run_onnx(model, feeds)
    worst(torch_outputs(m, feeds), got)
    p = _params(m.rnn)
    for row, n in enumerate(lengths):  # each row on its own, unpadded (the packed semantics)
        ref = run_module("gru", p, x[row:row + 1, :n], 2, True, True)
        worst([ref["output"][0], ref["h_n"][:, 0]], [got[0][row, :n], got[1][:, row]])
        assert not got[0][row, n:].any()  # pad_packed_sequence pads with zeros


def test_forecasting_style_subclass_exports_like_the_base_layer(rng: np.random.Generator) -> None:
    m = randomize(Plain())
    model = export(m)
    feeds = {"x": rand(rng, 2, 5, 3)}
    got = run_onnx(model, feeds)
    worst(torch_outputs(m, feeds), got)
    ref = run_module("rnn", _params(m.rnn), feeds["x"], 1, False, True, relu=True)
    worst([ref["output"][:, -1] * 2.0, ref["h_n"]], got)
    names = [p.name for p in read_probe_map(model)]
    assert names == ["rnn/l0/forward/hidden_sequence", "rnn/l0/forward/hidden_final"], names
    assert all(p.source["base_forward"] for p in read_probe_map(model))


def test_data_branch_inside_the_subclass_is_refused_naming_its_line() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(WithLengths()), ["x:batch,time,3", "lengths:batch"])
    msg = str(e.value)
    assert "if lengths.max() == 0:" in msg and "decides on tensor data" in msg, msg


FACTORY = '''
import torch
from torch import nn


class TimeMajorLSTM(nn.LSTM):
    def forward(self, x, hx=None):
        out, state = super().forward(x.transpose(0, 1), hx)
        return out.transpose(0, 1) * 0.5, state


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.enc = TimeMajorLSTM(3, 5, num_layers=2, bidirectional=True)
        self.plain = nn.GRU(10, 4, batch_first=True)

    def forward(self, x):
        y, _ = self.enc(x)
        z, h = self.plain(y)
        return z[:, -1], h


def make():
    torch.manual_seed(5)
    return Net()
'''


def test_cli_verify_reads_the_states_of_the_base_call(tmp_path: Path) -> None:
    names = cli_export_verify(tmp_path, FACTORY)
    for k in (0, 1):
        for d in ("forward", "reverse"):
            assert f"enc/l{k}/{d}/hidden_sequence" in names and f"enc/l{k}/{d}/cell_final" in names, names
    assert "plain/l0/forward/hidden_sequence" in names
