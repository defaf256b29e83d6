"""``seqgate export --input`` end to end: named tensors of a dict, integer inputs, dims as
expressions — exported, then verified and profiled against the PyTorch source without the
options repeated (the ONNX file's metadata carries them); bad options and wrong guesses exit 2.
"""

from __future__ import annotations

import json
import re
import textwrap
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import torch

from cli_helpers import invoke as _invoke
from seqgate.export.torch.declared import parse_one

torch.set_num_threads(1)
README = Path(__file__).resolve().parents[2] / "README.md"

NETS = '''
import torch
from torch import nn


class Forecaster(nn.Module):
    def __init__(self):
        super().__init__()
        self.lstm = nn.LSTM(3, 5, batch_first=True)
        self.head = nn.Linear(5, 2)

    def forward(self, batch: dict):
        y, _ = self.lstm(batch["encoder_cont"])
        return self.head(y[:, -1]) * batch["target_scale"]


class Lengths(nn.Module):
    def __init__(self):
        super().__init__()
        self.gru = nn.GRU(3, 4, batch_first=True)

    def forward(self, x, lengths):
        _, h = self.gru(x)
        return h[0] * (lengths.unsqueeze(-1).float() / x.size(1))


class EncDec(nn.Module):
    def __init__(self):
        super().__init__()
        self.enc = nn.GRU(3, 4, batch_first=True)
        self.dec = nn.GRU(2, 4, batch_first=True)

    def forward(self, enc, dec):
        _, h = self.enc(enc)
        return self.dec(dec, h)[0]


class Guessed(nn.Module):
    def __init__(self):
        super().__init__()
        self.lstm = nn.LSTM(1, 8, batch_first=True)

    def forward(self, x):
        return self.lstm(x[..., 1:2])[0]


def forecaster():
    return Forecaster()


def lengths():
    return Lengths()


def encdec():
    return EncDec()


def guessed():
    return Guessed()
'''

FAST = ["--warmup", "1", "--min-runs", "3", "--min-time", "0", "--seq-lens", "2,6", "--batch-sizes", "1",
        "--threads", "1"]


@pytest.fixture(scope="module")
def nets(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    d = tmp_path_factory.mktemp("nets")
    py = d / "nets.py"
    py.write_text(textwrap.dedent(NETS))
    import importlib.util

    spec = importlib.util.spec_from_file_location("seqgate_test_nets", py)
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    out = {"dir": d, "py": py}
    for name in ("forecaster", "lengths", "encdec"):
        torch.manual_seed(7)
        m = getattr(mod, name)()
        for p in m.parameters():
            torch.nn.init.uniform_(p, -0.5, 0.5)
        torch.save(m.state_dict(), d / f"{name}.pt")
        out[name] = d / f"{name}.pt"
    return out


def _export(nets: dict[str, Path], name: str, *specs: str) -> Path:
    out = nets["dir"] / f"{name}.onnx"
    args = [a for s in specs for a in ("--input", s)]
    r = _invoke("export", f"{nets['py']}:{name}", "--weights", str(nets[name]), *args, "-o", str(out),
                "--force")
    assert r.exit_code == 0, r.output
    return out


def _verify(nets: dict[str, Path], name: str, model: Path, *extra: str) -> dict[str, Any]:
    rep = nets["dir"] / f"{name}.verify.json"
    r = _invoke("verify", str(model), "--source", f"{nets['py']}:{name}", "--weights", str(nets[name]),
                "--report", str(rep), *extra)
    assert r.exit_code == 0, r.output
    return dict(json.loads(rep.read_text()))


def test_dict_forward_exports_and_verifies(nets: dict[str, Path], rng: np.random.Generator) -> None:
    model = _export(nets, "forecaster", "batch.encoder_cont:batch,time,3", "batch.target_scale:batch,2")
    rec = nets["dir"] / "forecaster.npz"
    np.savez(rec, **{"batch.encoder_cont": rng.normal(size=(6, 8, 3)).astype(np.float32),
                     "batch.target_scale": rng.uniform(0.5, 2, size=(6, 2)).astype(np.float32)})
    report = _verify(nets, "forecaster", model, "--synthetic", "--recording", str(rec))
    assert report["passed"] and [i["name"] for i in report["model"]["inputs"]] == [
        "batch.encoder_cont", "batch.target_scale"]
    assert "recorded" in {r["kind"] for r in report["recordings"]}
    prof = nets["dir"] / "forecaster.profile.json"
    r = _invoke("profile", str(model), *FAST, "--source", f"{nets['py']}:forecaster", "--weights",
                str(nets["forecaster"]), "--report", str(prof))
    assert r.exit_code == 0, r.output
    runtimes = {p["runtime"] for p in json.loads(prof.read_text())["points"]}
    assert runtimes == {"onnxruntime", "torch"}, runtimes  # the source ran on the rebuilt dict


def test_integer_lengths_verify_and_profile(nets: dict[str, Path], rng: np.random.Generator) -> None:
    model = _export(nets, "lengths", "x:batch,time,3", "lengths:batch:int64=1..time")
    rec = nets["dir"] / "lengths.npz"
    np.savez(rec, x=rng.normal(size=(5, 7, 3)).astype(np.float32),
             lengths=np.array([1, 3, 7, 7, 2], dtype=np.int64))
    report = _verify(nets, "lengths", model, "--synthetic", "--recording", str(rec))
    assert report["passed"]
    assert {i["name"]: i["dtype"] for i in report["model"]["inputs"]} == {"x": "float32", "lengths": "int64"}
    prof = nets["dir"] / "lengths.profile.json"
    r = _invoke("profile", str(model), *FAST, "--source", f"{nets['py']}:lengths", "--weights",
                str(nets["lengths"]), "--report", str(prof))
    assert r.exit_code == 0, r.output


def test_expression_dims_verify_and_profile(nets: dict[str, Path]) -> None:
    model = _export(nets, "encdec", "enc:batch,time,3", "dec:batch,time+6,2")
    report = _verify(nets, "encdec", model, "--synthetic")
    assert report["passed"]
    prof = nets["dir"] / "encdec.profile.json"
    r = _invoke("profile", str(model), *FAST, "--source", f"{nets['py']}:encdec", "--weights",
                str(nets["encdec"]), "--report", str(prof))
    assert r.exit_code == 0, r.output


@pytest.mark.parametrize(("spec", "needle"), [
    ("lengths:batch:int16=1..time", "dtype 'int16' is not one of float32, int64, int32, bool"),
    ("lengths:batch:float32=1..time", "a value range is for integer inputs"),
    ("x:batch,time*2,3", "dim 'time*2' is neither"),
    ("lengths:batch=1..horizon", "names no dim of any input"),
])
def test_bad_option_is_exit_2_in_one_paragraph(nets: dict[str, Path], spec: str, needle: str) -> None:
    out = nets["dir"] / "bad.onnx"
    r = _invoke("export", f"{nets['py']}:lengths", "--weights", str(nets["lengths"]), "--input", spec,
                "-o", str(out))
    assert r.exit_code == 2 and needle in r.output, r.output
    assert r.output.strip().count("\n") == 0, r.output  # one paragraph
    assert not out.exists()


def test_wrong_guess_is_exit_2_naming_the_guess(nets: dict[str, Path]) -> None:
    r = _invoke("export", "--untrained", f"{nets['py']}:guessed", "-o", str(nets["dir"] / "g.onnx"))
    assert r.exit_code == 2, r.output
    assert "guessed x as [batch, time, 1]" in r.output and "--input x:" in r.output, r.output


def test_readme_input_examples_parse() -> None:
    text = README.read_text(encoding="utf-8")
    section = text[text.index("#### Declaring PyTorch inputs"):]
    section = section[:section.index("\n### ") if "\n### " in section else len(section)]
    specs = re.findall(r"--input ([^\s`\\]+)", section)
    specs = [s for s in specs if not s.startswith(("NAME", "PARAM"))]
    assert len(specs) >= 8, specs
    for s in specs:
        parse_one(s)
