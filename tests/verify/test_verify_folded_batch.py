"""A model that folds each window into several batch rows (as dilated RNNs do): its recurrent
states have k·N rows, not N. verify used to crash on them (exit 4); their statistics must count.

Reference: PyTorch itself, and a direct NumPy comparison of the two runtimes' outputs.
"""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

import numpy as np
import torch
from typer.testing import CliRunner

from seqgate.cli.app import app

runner = CliRunner()

FOLDED = '''
import torch
from torch import nn


class Folded(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.gru = nn.GRU(3, 5, batch_first=True)
        self.fc = nn.Linear(5, 2)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        n = x.size(0)
        out, h = self.gru(x.reshape(n * 2, 6, 3))  # each 12-step window becomes two 6-step rows
        return self.fc(h[-1].reshape(n, 2, 5).mean(1))


def build() -> nn.Module:
    torch.manual_seed(0)
    return Folded()
'''


def test_states_with_folded_batch_are_compared_not_crashed(tmp_path: Path) -> None:
    py = tmp_path / "fold.py"
    py.write_text(textwrap.dedent(FOLDED), encoding="utf-8")
    import importlib.util

    spec = importlib.util.spec_from_file_location("fold_ref", py)
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    torch.save(mod.build().state_dict(), tmp_path / "w.pt")
    x = np.random.default_rng(0).normal(size=(40, 12, 3)).astype(np.float32)
    np.savez(tmp_path / "rec.npz", x=x)
    src = f"{py}:build"
    r = runner.invoke(app, ["export", src, "--weights", str(tmp_path / "w.pt"), "-o", str(tmp_path / "f.onnx"),
                            "--input", "x:batch,12,3"])
    assert r.exit_code == 0, r.output
    report = tmp_path / "r.json"
    r = runner.invoke(app, ["verify", str(tmp_path / "f.onnx"), "--source", src, "--weights",
                            str(tmp_path / "w.pt"), "--recording", str(tmp_path / "rec.npz"),
                            "--batch-size", "16", "--quiet", "--report", str(report)])
    assert r.exit_code == 0, r.output
    tensors = {t["name"]: t for t in json.loads(report.read_text())["tensors"]}
    states = [t for t in tensors.values() if t["kind"] != "output"]
    assert states and all(t["metrics"]["elements"] > 0 for t in states)
    # the output's max |Δ| equals a direct comparison of PyTorch and onnxruntime on all 40 windows
    import onnxruntime as ort

    model = mod.build()
    model.load_state_dict(torch.load(tmp_path / "w.pt", weights_only=True))
    with torch.no_grad():
        ref = model.eval()(torch.from_numpy(x)).numpy().astype(np.float64)
    sess = ort.InferenceSession(str(tmp_path / "f.onnx"), providers=["CPUExecutionProvider"])
    got = np.concatenate([sess.run(None, {"x": x[i:i + 16]})[0] for i in range(0, 40, 16)]).astype(np.float64)
    out = next(t for t in tensors.values() if t["kind"] == "output")
    assert abs(out["metrics"]["max_abs"] - np.abs(got - ref).max()) < 1e-6
