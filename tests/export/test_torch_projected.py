"""``nn.LSTM(proj_size > 0)``: one ONNX Scan per layer and direction, checked two ways.

References: PyTorch's own forward (torch's eager kernels), and a float64 NumPy run of the
equations in the ``torch.nn.LSTM`` documentation, written out here:
``i, f, g, o = σ, σ, tanh, σ of (W_i· x_t + b_i· + W_h· h_{t−1} + b_h·)`` (gate order i, f, g, o),
``c_t = f ⊙ c_{t−1} + i ⊙ g``, ``h_t = W_hr (o ⊙ tanh(c_t))``; layer k+1 reads layer k's
outputs of both directions concatenated; the reverse direction runs from the last step.
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

Array = np.ndarray[Any, Any]


def _sigmoid(x: Array) -> Array:
    return 1.0 / (1.0 + np.exp(-x))


def numpy_projected_lstm(p: dict[str, Array], x: Array, layers: int, bidirectional: bool,
                         h0: Array | None = None, c0: Array | None = None) -> tuple[Array, Array, Array]:
    """x ``[N, T, I]`` → (output ``[N, T, D·P]``, h_n ``[L·D, N, P]``, c_n ``[L·D, N, H]``), float64."""
    n, t_len, _ = x.shape
    dirs = 2 if bidirectional else 1
    hidden, proj = p["weight_hh_l0"].shape[0] // 4, p["weight_hr_l0"].shape[0]
    inp = x.astype(np.float64)
    hs, cs = [], []
    for k in range(layers):
        outs = []
        for d in range(dirs):
            sfx = "_reverse" if d else ""
            w_ih, w_hh, w_hr = (p[f"{w}_l{k}{sfx}"].astype(np.float64)
                                for w in ("weight_ih", "weight_hh", "weight_hr"))
            b = (p[f"bias_ih_l{k}{sfx}"] + p[f"bias_hh_l{k}{sfx}"]).astype(np.float64) \
                if f"bias_ih_l{k}{sfx}" in p else np.zeros(4 * hidden)
            row = k * dirs + d
            h = np.zeros((n, proj)) if h0 is None else h0[row].astype(np.float64)
            c = np.zeros((n, hidden)) if c0 is None else c0[row].astype(np.float64)
            ys = np.zeros((n, t_len, proj))
            for t in (range(t_len - 1, -1, -1) if d else range(t_len)):
                z = inp[:, t] @ w_ih.T + h @ w_hh.T + b
                i, f, g, o = (z[:, j * hidden:(j + 1) * hidden] for j in range(4))
                c = _sigmoid(f) * c + _sigmoid(i) * np.tanh(g)
                h = (_sigmoid(o) * np.tanh(c)) @ w_hr.T
                ys[:, t] = h
            outs.append(ys)
            hs.append(h)
            cs.append(c)
        inp = np.concatenate(outs, axis=-1)
    return inp, np.stack(hs), np.stack(cs)


class Projected(nn.Module):
    def __init__(self, layers: int, bidirectional: bool, bias: bool, batch_first: bool) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 6, num_layers=layers, bidirectional=bidirectional, bias=bias,
                            batch_first=batch_first, proj_size=2)
        self.batch_first = batch_first

    def forward(self, x: torch.Tensor, h0: torch.Tensor, c0: torch.Tensor) -> Any:
        return self.lstm(x if self.batch_first else x.transpose(0, 1), (h0, c0))


class ProjectedNoState(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 5, proj_size=4, batch_first=True)
        self.head = nn.Linear(4, 1)

    def forward(self, x: torch.Tensor) -> Any:
        out, (h, c) = self.lstm(x)
        return self.head(out[:, -1]), h, c


def _params(m: nn.Module) -> dict[str, Array]:
    return {k: v.detach().numpy() for k, v in m.state_dict().items()}


@pytest.mark.parametrize(("layers", "bidirectional", "bias", "batch_first"),
                         [(2, True, True, True), (1, False, False, False), (3, False, True, True)])
def test_projected_lstm_matches_torch_and_the_documented_equations(
        layers: int, bidirectional: bool, bias: bool, batch_first: bool, rng: np.random.Generator) -> None:
    m = randomize(Projected(layers, bidirectional, bias, batch_first))
    d = 2 if bidirectional else 1
    model = export(m, ["x:batch,time,3", f"h0:{layers * d},batch,2", f"c0:{layers * d},batch,6"])
    ops = [n.op_type for n in model.graph.node]
    assert ops.count("Scan") == layers * d and "LSTM" not in ops
    for n, t in ((1, 1), (4, 7)):
        x, h0, c0 = rand(rng, n, t, 3), rand(rng, layers * d, n, 2), rand(rng, layers * d, n, 6)
        feeds = {"x": x, "h0": h0, "c0": c0}
        got = run_onnx(model, feeds)
        worst(torch_outputs(m, feeds), got)
        y, h_n, c_n = numpy_projected_lstm(_params(m.lstm), x, layers, bidirectional, h0, c0)
        worst([y if batch_first else y.transpose(1, 0, 2), h_n, c_n], got)


def test_projected_lstm_without_initial_states_and_its_probes(rng: np.random.Generator) -> None:
    m = randomize(ProjectedNoState())
    model = export(m)
    x = rand(rng, 3, 6, 3)
    got = run_onnx(model, {"x": x})
    worst(torch_outputs(m, {"x": x}), got)
    y, h_n, c_n = numpy_projected_lstm(_params(m.lstm), x, 1, False)
    w, b = m.head.weight.detach().numpy().astype(np.float64), m.head.bias.detach().numpy()
    worst([y[:, -1] @ w.T + b, h_n, c_n], got)
    probes = {p.name: p for p in read_probe_map(model)}
    assert sorted(probes) == ["lstm/l0/forward/cell_final", "lstm/l0/forward/hidden_final",
                              "lstm/l0/forward/hidden_sequence"]
    assert probes["lstm/l0/forward/hidden_sequence"].source["exported_as"] == "Scan"


def test_projected_lstm_on_a_packed_sequence_is_refused() -> None:
    class Packed(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.lstm = nn.LSTM(3, 5, proj_size=2, batch_first=True)

        def forward(self, x: torch.Tensor, lengths: torch.Tensor) -> Any:
            out, _ = self.lstm(pack_padded_sequence(x, lengths, batch_first=True, enforce_sorted=False))
            return pad_packed_sequence(out, batch_first=True)[0]

    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(Packed()), ["x:batch,time,3", "lengths:batch"])
    assert "proj_size=2 on a packed sequence" in str(e.value) and e.value.exit_code == 3


FACTORY = '''
import torch
from torch import nn


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.enc = nn.LSTM(3, 8, num_layers=2, bidirectional=True, batch_first=True, proj_size=3)
        self.head = nn.Linear(6, 1)

    def forward(self, x):
        out, (h, c) = self.enc(x)
        return self.head(out), c


def make():
    torch.manual_seed(3)
    return Net()
'''


def test_cli_verify_compares_every_projected_state(tmp_path: Path) -> None:
    names = cli_export_verify(tmp_path, FACTORY)
    assert {f"enc/l{k}/{d}/{kind}" for k in (0, 1) for d in ("forward", "reverse")
            for kind in ("hidden_sequence", "hidden_final", "cell_final")} <= names, names


def test_two_exports_of_a_projected_lstm_are_byte_identical() -> None:
    m = randomize(Projected(2, True, True, True))
    specs = ["x:batch,time,3", "h0:4,batch,2", "c0:4,batch,6"]
    assert export(m, specs).SerializeToString() == export(m, specs).SerializeToString()
