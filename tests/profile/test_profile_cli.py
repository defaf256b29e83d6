"""End to end: a tiny Keras model exported by seqgate, profiled beside Keras and beside PyTorch.

The PyTorch side is a factory file written here with the same weights: Keras LSTM kernels are
``(I, 4H)`` in gate order i, f, c, o and PyTorch's ``weight_ih_l0`` is ``(4H, I)`` in order
i, f, g, o (the same order; FACTS.md, from both frameworks' docs), so the copy is a transpose.
Tiny run counts keep this fast; nothing asserts an absolute time.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from typer.testing import CliRunner

from seqgate.cli.app import app

runner = CliRunner()
FAST = ["--warmup", "1", "--min-runs", "3", "--min-time", "0", "--seq-lens", "1,6"]
I, H, OUT = 4, 8, 2  # noqa: E741 (input and hidden sizes)

FACTORY = '''
import torch
from torch import nn


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.lstm = nn.LSTM(4, 8, batch_first=True)
        self.head = nn.Linear(8, 2)

    def forward(self, x):
        _, (h, _) = self.lstm(x)
        return self.head(h[-1])


def build():
    return Net()
'''


@pytest.fixture(scope="module")
def exported(tmp_path_factory: pytest.TempPathFactory, keras: Any) -> dict[str, Path]:
    from seqgate.export.run import export_source

    d = tmp_path_factory.mktemp("profile")
    m = keras.Sequential([keras.Input((None, I)), keras.layers.LSTM(H), keras.layers.Dense(OUT)])
    rng = np.random.default_rng(5)
    m.set_weights([rng.normal(0, 0.4, tuple(w.shape)).astype(np.float32) for w in m.weights])
    m.save(d / "tiny.keras")
    export_source(str(d / "tiny.keras"), d / "tiny.onnx")

    import torch

    kernel, recurrent, bias, dense_k, dense_b = (np.array(w.numpy()) for w in m.weights)
    state = {
        "lstm.weight_ih_l0": torch.from_numpy(kernel.T.copy()),
        "lstm.weight_hh_l0": torch.from_numpy(recurrent.T.copy()),
        "lstm.bias_ih_l0": torch.from_numpy(bias.copy()),
        "lstm.bias_hh_l0": torch.zeros(4 * H),
        "head.weight": torch.from_numpy(dense_k.T.copy()),
        "head.bias": torch.from_numpy(dense_b.copy()),
    }
    (d / "net.py").write_text(FACTORY, encoding="utf-8")
    torch.save(state, d / "net.pt")
    return {"dir": d, "keras": d / "tiny.keras", "onnx": d / "tiny.onnx", "factory": d / "net.py",
            "weights": d / "net.pt"}


def _check_side_by_side(report: dict[str, Any], source_runtime: str) -> None:
    assert report["schema"] == "seqgate.profile/1" and report["passed"] is True
    pts = report["points"]
    assert {p["runtime"] for p in pts} == {"onnxruntime", source_runtime}
    assert len(pts) == 2 * 2 * 2  # 2 lengths × 2 batches × 2 runtimes
    ort = {(p["seq_len"], p["batch"], p["threads"]): p for p in pts if p["runtime"] == "onnxruntime"}
    for p in pts:
        # LSTM I=4 H=8: 4 gates × (8·4 + 8·8) = 384 MACs per step; Dense 8→2: 16 per sequence
        assert p["macs_per_sequence"] == 384 * p["seq_len"] + 16
        if p["runtime"] == source_runtime:
            base = ort[(p["seq_len"], p["batch"], p["threads"])]
            # speed-up of ONNX Runtime = source p50 / ONNX Runtime p50, shown on both points
            assert p["speedup"] == pytest.approx(p["p50_ms"] / base["p50_ms"])
            assert base["speedup"] == p["speedup"]
    assert report["source"]["framework"] == source_runtime
    assert report["source"]["outputs_agree"] is True, report["source"]["outputs_check"]
    for f in report["source"]["files"]:
        assert f["sha256"] == hashlib.sha256(Path(f["path"]).read_bytes()).hexdigest()
    # two lengths (1, 6): no latency line is fitted, and a note says so for each series
    assert report["fits"] == []
    assert sum("too few lengths to fit" in n for n in report["notes"]) == 2 * 2  # 2 batches × 2 runtimes


def test_profile_beside_keras_writes_every_output(exported: dict[str, Path]) -> None:
    d = exported["dir"]
    r = runner.invoke(app, ["profile", str(exported["onnx"]), *FAST, "--batch-sizes", "1,2", "--source",
                            str(exported["keras"]), "--budget", "6=100000", "--report", str(d / "k.json"),
                            "--csv", str(d / "k.csv"), "--plot", str(d / "k.png")])
    assert r.exit_code == 0, r.output
    assert "keras" in r.output and "speed-up" in r.output and "PASSED: every budget met" in r.output
    report = json.loads((d / "k.json").read_text())
    _check_side_by_side(report, "keras")
    assert report["model"]["sha256"] == hashlib.sha256(exported["onnx"].read_bytes()).hexdigest()
    rows = list(csv.DictReader(io.StringIO((d / "k.csv").read_text())))
    assert len(rows) == len(report["points"])
    assert [float(x["p50_ms"]) for x in rows] == [p["p50_ms"] for p in report["points"]]
    assert (d / "k.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec §5.2)


def test_profile_beside_torch(exported: dict[str, Path]) -> None:
    import torch

    before = torch.get_num_threads()
    d = exported["dir"]
    r = runner.invoke(app, ["profile", str(exported["onnx"]), *FAST, "--batch-sizes", "1,2", "--threads", "1",
                            "--source", f"{exported['factory']}:build", "--weights", str(exported["weights"]),
                            "--report", str(d / "t.json")])
    assert r.exit_code == 0, r.output
    report = json.loads((d / "t.json").read_text())
    _check_side_by_side(report, "torch")
    assert all(p["framework_threads"] == 1 for p in report["points"] if p["runtime"] == "torch")
    assert torch.get_num_threads() == before


def test_missed_budget_on_exported_model_exits_1(exported: dict[str, Path]) -> None:
    r = runner.invoke(app, ["profile", str(exported["onnx"]), "--warmup", "0", "--min-runs", "2",
                            "--min-time", "0", "--seq-lens", "1", "--budget", "8=0.000001"])
    assert r.exit_code == 1, r.output
    assert "FAILED: 1 of 1 budget verdicts over budget" in " ".join(r.output.split())
    assert "budget length(s) 8 added to the sweep" in " ".join(r.output.split())


def test_source_that_is_not_the_export(exported: dict[str, Path]) -> None:
    d = exported["dir"]
    # the factory without its weights: random initial weights, so the outputs differ → a note
    r = runner.invoke(app, ["profile", str(exported["onnx"]), *FAST, "--source", f"{exported['factory']}:build",
                            "--report", str(d / "u.json")])
    assert r.exit_code == 0, r.output
    report = json.loads((d / "u.json").read_text())
    assert report["source"]["outputs_agree"] is False
    assert any("do not match the ONNX model's" in n for n in report["notes"])
    # a module taking 5 features cannot run on the graph's [batch, time, 4] input → exit 2
    (d / "wide.py").write_text(FACTORY.replace("nn.LSTM(4, 8", "nn.LSTM(5, 8"), encoding="utf-8")
    r = runner.invoke(app, ["profile", str(exported["onnx"]), *FAST, "--source", f"{d / 'wide.py'}:build"])
    out = " ".join(r.output.split())
    assert r.exit_code == 2, out
    # Keras numbers auto-named inputs per process (input_layer, input_layer_1, …): match any of them
    assert re.search(r"the torch source failed on the inputs the ONNX model takes \(input_layer\w* \[1, 1, 4\] "
                     r"float32\)", out), out
    assert "Traceback" not in out
