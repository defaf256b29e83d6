"""verify end to end on PyTorch models whose inputs are not [batch, time, features]: token ids, an
initial-state input [L·D, batch, H] and a time-major input; every tensor must pass (honest export)."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pytest

NETS = '''
import torch
from torch import nn
import torch.nn.functional as F


class Tokens(nn.Module):
    def __init__(self):
        super().__init__()
        self.emb = nn.Embedding(40, 6)
        self.rnn = nn.LSTM(6, 8, num_layers=2, bidirectional=True, batch_first=True)
        self.fc = nn.Linear(16, 3)

    def forward(self, tokens):
        out, (h, c) = self.rnn(self.emb(tokens))
        return F.log_softmax(self.fc(torch.cat((h[-2], h[-1]), dim=1)), dim=-1)


class State(nn.Module):
    def __init__(self):
        super().__init__()
        self.rnn = nn.RNN(3, 5, num_layers=2, nonlinearity="relu", batch_first=True)

    def forward(self, x, h0):
        y, hn = self.rnn(x, h0)
        return y * 0.5 + 1.0, hn


class TimeMajor(nn.Module):
    def __init__(self):
        super().__init__()
        self.gru = nn.GRU(4, 7)

    def forward(self, x):
        seq, h = self.gru(x)
        return seq[-1]


def tokens(): return Tokens()
def state(): return State()
def time_major(): return TimeMajor()
'''


@pytest.fixture(scope="module")
def nets(tmp_path_factory: pytest.TempPathFactory) -> Path:
    d = tmp_path_factory.mktemp("layouts")
    (d / "nets.py").write_text(NETS, encoding="utf-8")
    return d


@pytest.mark.parametrize(
    ("factory", "arrays"),
    [
        ("tokens", {"tokens": ("int", (24, 15))}),
        ("state", {"x": ("float", (24, 11, 3)), "h0": ("float", (24, 2, 5))}),  # h0 stored windows first
        ("time_major", {"x": ("float", (24, 13, 4))}),  # [windows, steps, features] for a [T, N, F] input
    ],
)
def test_honest_export_passes(nets: Path, factory: str, arrays: dict[str, tuple[str, tuple[int, ...]]]) -> None:
    import torch

    from seqgate.export.run import export_source
    from seqgate.verify.run import verify_model

    torch.manual_seed(3)
    src = f"{nets / 'nets.py'}:{factory}"
    spec = importlib.util.spec_from_file_location(f"nets_{factory}", nets / "nets.py")
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    net = getattr(mod, factory)()
    with torch.no_grad():
        for p in net.parameters():
            p.uniform_(-0.4, 0.4)
    weights = nets / f"{factory}.pt"
    torch.save(net.state_dict(), weights)
    onnx_path = nets / f"{factory}.onnx"
    export_source(src, onnx_path, weights=str(weights), force=True)
    rng = np.random.default_rng(0)
    rec = {k: (rng.integers(0, 40, shape) if kind == "int" else rng.normal(size=shape).astype(np.float32))
           for k, (kind, shape) in arrays.items()}
    np.savez(nets / f"{factory}.npz", **rec)
    rep = verify_model(onnx_path, src, str(weights), recordings=[nets / f"{factory}.npz"], synthetic=True)
    assert rep.passed, rep.headline()
    kinds = {r["kind"] for r in rep.recordings}
    assert "synthetic:long" in kinds  # every model here has a dynamic time axis
    assert all(t["passed"] for t in rep.tensors)
    assert len(rep.tensors) > len([o for o in rep.tensors if o["kind"] == "output"])  # probes compared too
