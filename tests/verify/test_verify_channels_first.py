"""Channels-first models (``[batch, features, time]``, a Conv1d first): ``verify --synthetic`` makes
windows of real length along the time axis, and a verification that would run fewer than 2 time
steps is refused (exit 2) instead of passing."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import pytest
from typer.testing import CliRunner

from seqgate.cli.app import app
from seqgate.verify.recordings import input_specs
from seqgate.verify.synthetic import DEFAULT_STEPS, synthetic_sets, time_axis

runner = CliRunner()

NET = '''
import torch
from torch import nn


class ConvLSTM(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv = nn.Conv1d(3, 4, kernel_size=3, padding=1)
        self.lstm = nn.LSTM(4, 5, batch_first=True)
        self.fc = nn.Linear(5, 2)

    def forward(self, x):
        z = torch.relu(self.conv(x)).transpose(1, 2)
        out, _ = self.lstm(z)
        return self.fc(out[:, -1])


def make():
    torch.manual_seed(5)
    return ConvLSTM()
'''


@pytest.fixture(scope="module")
def conv(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    import importlib.util

    import torch

    d = tmp_path_factory.mktemp("convnet")
    (d / "net.py").write_text(NET)
    spec = importlib.util.spec_from_file_location("seqgate_test_convnet", d / "net.py")
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    torch.save(mod.make().state_dict(), d / "w.pt")
    r = runner.invoke(app, ["export", f"{d / 'net.py'}:make", "--weights", str(d / "w.pt"),
                            "-o", str(d / "c.onnx")])
    assert r.exit_code == 0, r.output
    return {"dir": d, "source": Path(f"{d / 'net.py'}:make"), "onnx": d / "c.onnx", "weights": d / "w.pt"}


def test_synthetic_windows_run_along_the_time_axis(conv: dict[str, Path]) -> None:
    specs = input_specs(onnx.load(str(conv["onnx"])))
    assert [s.dims for s in specs] == [("batch", 3, "time")]  # Conv1d input: [batch, C_in, time]
    assert time_axis(specs[0]) == 2
    sets = {r.label: r.arrays["x"].shape for r in synthetic_sets(specs, None, seed=0)}
    assert sets["synthetic:scaled"] == (32, 3, DEFAULT_STEPS)
    assert sets["synthetic:long"] == (32, 3, 4 * DEFAULT_STEPS)  # the long set now exists


def test_verify_synthetic_passes_with_real_length_windows(conv: dict[str, Path]) -> None:
    rep = conv["dir"] / "r.json"
    r = runner.invoke(app, ["verify", str(conv["onnx"]), "--source", str(conv["source"]),
                            "--weights", str(conv["weights"]),
                            "--synthetic", "--quiet", "--report", str(rep)])
    assert r.exit_code == 0, r.output
    assert "synthetic:long" in json.dumps(json.loads(rep.read_text()))


def _one_step(conv: dict[str, Path], shape: tuple[int, ...]) -> Any:
    rec = conv["dir"] / "one.npz"
    np.savez(rec, x=np.random.default_rng(0).normal(size=shape).astype(np.float32))
    return runner.invoke(app, ["verify", str(conv["onnx"]), "--source", str(conv["source"]),
                            "--weights", str(conv["weights"]),
                               "--recording", str(rec), "--quiet"])


def test_a_verification_of_one_time_step_is_refused(conv: dict[str, Path]) -> None:
    r = _one_step(conv, (6, 3, 1))
    assert r.exit_code == 2, r.output
    assert "only 1 time step" in r.output and "x [batch, 3, time] time axis 2" in r.output, r.output


def test_two_recorded_steps_are_enough(conv: dict[str, Path]) -> None:
    assert _one_step(conv, (6, 3, 2)).exit_code == 0
