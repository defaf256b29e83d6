"""verify on PyTorch models through the CLI: honest exports pass, planted bugs fail at the right layer.

The three-layer LSTM is one module, exported as one ONNX LSTM node per stacked layer; the
bugs are planted in layer 1's node so layer 0's probes must still pass. Expected steps from
the ONNX LSTM equations (operator spec): with zero initial states, step 0 sees R only through
``R·H_prev = 0``, so a perturbed R first shows at step 1, swapped W gate blocks at step 0.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import pytest
from onnx import numpy_helper
from typer.testing import CliRunner

from seqgate.cli.app import app

torch = pytest.importorskip("torch")
runner = CliRunner()
H = 5

NET = '''
import torch
from torch import nn


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.enc = nn.LSTM(3, 5, num_layers=3, batch_first=True)
        self.bi = nn.GRU(5, 4, bidirectional=True)
        self.head = nn.Linear(8, 2)

    def forward(self, x):
        y, (h, c) = self.enc(x)
        z, hz = self.bi(y.transpose(0, 1))
        return torch.softmax(self.head(z[-1]), dim=-1), h


def make():
    torch.manual_seed(11)
    return Net()
'''


@pytest.fixture(scope="module")
def net(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    d = tmp_path_factory.mktemp("torchnet")
    (d / "net.py").write_text(NET)
    import importlib.util

    spec = importlib.util.spec_from_file_location("seqgate_test_net", d / "net.py")
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    torch.save(mod.make().state_dict(), d / "w.pt")
    r = runner.invoke(app, ["export", f"{d / 'net.py'}:make", "--weights", str(d / "w.pt"),
                            "-o", str(d / "n.onnx")])
    assert r.exit_code == 0, r.output
    np.savez(d / "rec.npz", x=np.random.default_rng(3).normal(size=(12, 8, 3)).astype(np.float32))
    return {"dir": d, "source": Path(f"{d / 'net.py'}:make"), "weights": d / "w.pt", "onnx": d / "n.onnx",
            "rec": d / "rec.npz"}


def _verify(net: dict[str, Path], model: Path, *extra: str) -> Any:
    return runner.invoke(app, ["verify", str(model), "--source", str(net["source"]), "--weights",
                               str(net["weights"]), "--recording", str(net["rec"]), "--quiet", *extra])


def test_honest_torch_export_passes_with_every_layer_and_direction(net: dict[str, Path]) -> None:
    rep_path = net["dir"] / "r.json"
    r = _verify(net, net["onnx"], "--synthetic", "--report", str(rep_path))
    assert r.exit_code == 0, r.output
    doc = json.loads(rep_path.read_text())
    names = [t["name"] for t in doc["tensors"]]
    for k in range(3):
        assert f"enc/l{k}/forward/hidden_sequence" in names and f"enc/l{k}/forward/cell_final" in names
    assert "bi/l0/reverse/hidden_sequence" in names and names[-2:] == ["output_0", "output_1"]
    assert next(t for t in doc["tensors"] if t["name"] == "output_0")["metrics"]["top1_agreement"] == 1.0


def _tamper(net: dict[str, Path], name: str, edit: Any) -> Path:
    m = onnx.load(str(net["onnx"]))
    node = [n for n in m.graph.node if n.op_type == "LSTM"][1]  # enc layer 1
    inits = {i.name: i for i in m.graph.initializer}
    edit(node, inits)
    out = net["dir"] / f"{name}.onnx"
    onnx.save(m, str(out))
    return out


def _perturb_r(node: Any, inits: dict[str, Any]) -> None:
    r = numpy_helper.to_array(inits[node.input[2]]).copy()
    r[0, 3 * H + 2, 1] += 0.05  # one weight of the cell gate c
    inits[node.input[2]].CopyFrom(numpy_helper.from_array(r, node.input[2]))


def _swap_gates(node: Any, inits: dict[str, Any]) -> None:
    w = numpy_helper.to_array(inits[node.input[1]]).copy()
    w[0, H:3 * H] = np.concatenate([w[0, 2 * H:3 * H], w[0, H:2 * H]])  # o ↔ f
    inits[node.input[1]].CopyFrom(numpy_helper.from_array(w, node.input[1]))


@pytest.mark.parametrize("name, edit, step", [("perturbed", _perturb_r, 1), ("gates", _swap_gates, 0)])
def test_planted_bug_in_stacked_layer_one(net: dict[str, Path], name: str, edit: Any, step: int) -> None:
    bad = _tamper(net, name, edit)
    rep_path = net["dir"] / f"{name}.json"
    r = _verify(net, bad, "--report", str(rep_path))
    assert r.exit_code == 1, r.output
    fd = json.loads(rep_path.read_text())["first_divergence"]
    assert fd["tensor"] == "enc/l1/forward/hidden_sequence" and fd["step"] == step
    assert "enc/l1/forward/hidden_sequence" in r.output
