"""``seqgate export FILE.py:FACTORY --weights W.pt``: success, --input, and every bad-input error.

Exit codes (DESIGN.md): 2 bad input (files, factory, weights, --input), 3 a module seqgate
cannot export (unsupported modules, forward that torch.fx cannot trace). No run prints a
traceback or leaves an output file behind when it fails.
"""

from __future__ import annotations

import importlib.metadata
import textwrap
from pathlib import Path

import numpy as np
import onnx
import pytest
import torch

from cli_helpers import invoke as _invoke
from seqgate.onnxfile.probes import read_metadata
from seqgate.sources.spec import parse_source
from seqgate.sources.torch import load_torch, load_torch_with_info
from torch_models import FACTORY_FILE, run_onnx, torch_outputs, worst

torch.set_num_threads(1)


def _write(tmp: Path, name: str, body: str) -> Path:
    p = tmp / name
    p.write_text(textwrap.dedent(body))
    return p


@pytest.fixture
def good(tmp_path: Path) -> dict[str, Path]:
    """A factory file and a state dict of the same architecture with other random weights."""
    py = _write(tmp_path, "net.py", FACTORY_FILE)
    module = load_torch(parse_source(f"{py}:build"))
    torch.manual_seed(42)
    for p in module.parameters():
        torch.nn.init.uniform_(p, -0.5, 0.5)
    pt = tmp_path / "net.pt"
    torch.save(module.state_dict(), pt)
    return {"py": py, "pt": pt, "dir": tmp_path}


def test_export_factory_with_weights(good: dict[str, Path], rng: np.random.Generator) -> None:
    out = good["dir"] / "net.onnx"
    r = _invoke("export", f"{good['py']}:build", "--weights", str(good["pt"]), "-o", str(out))
    assert r.exit_code == 0, r.output
    assert "wrote" in r.output and "probes" in r.output
    model = onnx.load(str(out))
    module = load_torch(parse_source(f"{good['py']}:build", str(good["pt"])))
    feeds = {"x": rng.normal(size=(2, 15, 4)).astype(np.float32)}
    worst(torch_outputs(module, feeds), run_onnx(model, feeds))
    meta = read_metadata(model)
    assert meta["seqgate.source.framework"] == "torch"
    assert meta["seqgate.source.framework_version"] == importlib.metadata.version("torch")
    assert meta["seqgate.source.eval_mode"] == "true"
    assert meta["seqgate.source.was_training"] == "true"  # a fresh nn.Module starts in training mode
    assert meta["seqgate.source.file"] == "net.py" and len(meta["seqgate.source.weights_sha256"]) == 64


def test_weights_are_really_loaded(good: dict[str, Path]) -> None:
    plain = load_torch(parse_source(f"{good['py']}:build"))
    loaded, info = load_torch_with_info(parse_source(f"{good['py']}:build", str(good["pt"])))
    assert not loaded.training and info.was_training and info.weights_loaded
    saved = torch.load(good["pt"], weights_only=True)
    assert torch.equal(loaded.fc.weight, saved["fc.weight"])
    assert not torch.equal(plain.fc.weight, saved["fc.weight"])


def test_module_path_factory_and_input_override(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    _write(tmp_path, "seqgate_test_pkg_mod.py", FACTORY_FILE)
    monkeypatch.syspath_prepend(str(tmp_path))
    out = tmp_path / "m.onnx"
    r = _invoke("export", "--untrained", "seqgate_test_pkg_mod:build", "--input", "x:1,steps,4", "-o", str(out))
    assert r.exit_code == 0, r.output
    dims = [d.dim_param or d.dim_value for d in onnx.load(str(out)).graph.input[0].type.tensor_type.shape.dim]
    assert dims == [1, "steps", 4]


def test_same_source_gives_identical_bytes(good: dict[str, Path]) -> None:
    a, b = good["dir"] / "a.onnx", good["dir"] / "b.onnx"
    for p in (a, b):
        r = _invoke("export", f"{good['py']}:build", "--weights", str(good["pt"]), "-o", str(p))
        assert r.exit_code == 0
    assert a.read_bytes() == b.read_bytes()


BAD_FACTORIES = {
    "raises": ("def build():\n    raise ValueError('hidden size must be even')\n",
               ["ValueError", "hidden size must be even", "bad.py:2"]),
    "not_module": ("def build():\n    return {'a': 1}\n", ["returned a builtins.dict", "torch.nn.Module"]),
    "syntax": ("def build(:\n    pass\n", ["syntax error at line 1"]),
    "import_fails": ("import not_a_real_module_xyz\n", ["ModuleNotFoundError", "not_a_real_module_xyz"]),
    "double": ("import torch\ndef build():\n    return torch.nn.Linear(2, 2).double()\n",
               ["float64", "model.float()"]),
}


@pytest.mark.parametrize("case", sorted(BAD_FACTORIES))
def test_bad_factory_exit_2(case: str, tmp_path: Path) -> None:
    body, needles = BAD_FACTORIES[case]
    py = _write(tmp_path, "bad.py", body)
    out = tmp_path / "o.onnx"
    r = _invoke("export", "--untrained", f"{py}:build", "-o", str(out))
    assert r.exit_code == 2, r.output
    for n in needles:
        assert n in r.output, (n, r.output)
    assert not out.exists()


def test_missing_factory_name_lists_callables(good: dict[str, Path]) -> None:
    r = _invoke("export", "--untrained", f"{good['py']}:make_model", "-o", str(good["dir"] / "o.onnx"))
    assert r.exit_code == 2
    assert "'make_model'" in r.output and "build" in r.output and "Net" in r.output


def test_missing_file(tmp_path: Path) -> None:
    r = _invoke("export", "--untrained", f"{tmp_path / 'nope.py'}:build", "-o", str(tmp_path / "o.onnx"))
    assert r.exit_code == 2 and "does not exist" in r.output


def _bad_weights(good: dict[str, Path], kind: str) -> Path:
    module = load_torch(parse_source(f"{good['py']}:build"))
    p = good["dir"] / f"{kind}.pt"
    sd = module.state_dict()
    if kind == "pickled_module":
        torch.save(module, p)
    elif kind == "pickled_sequential":
        torch.save(torch.nn.Sequential(torch.nn.Linear(2, 2)), p)
    elif kind == "keys":
        sd["extra.bias"] = torch.zeros(3)
        del sd["fc.bias"]
        torch.save(sd, p)
    elif kind == "shapes":
        sd["fc.weight"] = torch.zeros(5, 6)
        torch.save(sd, p)
    elif kind == "corrupt":
        torch.save(sd, p)
        p.write_bytes(p.read_bytes()[:200])
    elif kind == "data_parallel":
        torch.save({f"module.{k}": v for k, v in sd.items()}, p)
    elif kind == "checkpoint":
        torch.save({"model": sd, "epoch": 3}, p)
    return p


BAD_WEIGHTS = {
    "pickled_module": ["pickled", "torch.save(model.state_dict()", "weights_only=True"],
    "pickled_sequential": ["pickled", "torch.save(model.state_dict()"],
    "keys": ["1 missing key(s) (fc.bias)", "1 unexpected key(s) (extra.bias)"],
    "shapes": ["fc.weight: expected (3, 6), found (5, 6)"],
    "corrupt": ["not a readable PyTorch weights file"],
    "checkpoint": ["'model'", "'epoch'", "state dict"],
    "data_parallel": ["unexpected key(s) (module.rnn.weight_ih_l0", "model.module.state_dict()"],
}


@pytest.mark.parametrize("kind", sorted(BAD_WEIGHTS))
def test_bad_weights_exit_2(kind: str, good: dict[str, Path]) -> None:
    w = _bad_weights(good, kind)
    out = good["dir"] / "o.onnx"
    r = _invoke("export", f"{good['py']}:build", "--weights", str(w), "-o", str(out))
    assert r.exit_code == 2, r.output
    for n in BAD_WEIGHTS[kind]:
        assert n in r.output, (n, r.output)
    assert not out.exists()


UNTRACEABLE = {
    "control_flow": ("if x.sum() > 0:\n            x = x * 2\n        return self.rnn(x)[0]",
                     ["control flow", "if x.sum() > 0:", "constructor argument"]),
    "int_size": ("n = int(x.size(1))\n        return self.rnn(x)[0].view(-1, n)",
                 ["int(x.size(1))", "Python int"]),
    # pack_padded_sequence with a lengths input is supported (test_torch_packing.py); pack_sequence is not
    "packed": ("p = nn.utils.rnn.pack_sequence([x[0], x[1]])\n"
               "        return self.rnn(p)[1]",
               ["pack_sequence", "pack_sequence and hand-built PackedSequence objects are not supported"]),
    "python_loop": ("for t in range(x.size(1)):\n            x = x + 1\n        return x",
                    ["range(x.size(1))", "loop over time"]),
}


@pytest.mark.parametrize("case", sorted(UNTRACEABLE))
def test_untraceable_forward_exit_3(case: str, tmp_path: Path) -> None:
    body, needles = UNTRACEABLE[case]
    py = _write(tmp_path, "untr.py", f"""
import torch
from torch import nn

class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.rnn = nn.GRU(4, 4, batch_first=True)

    def forward(self, x):
        {body}

def build():
    return Net()
""")
    r = _invoke("export", "--untrained", f"{py}:build", "--input", "x:batch,time,4",
                "-o", str(tmp_path / "o.onnx"))
    assert r.exit_code == 3, r.output
    # a branch on tensor data or a loop over time is named by seqgate's own check (test_torch_branches.py)
    assert "torch.fx cannot trace" in r.output or case in ("control_flow", "python_loop")
    assert "untr.py:" in r.output
    for n in needles:
        assert n in r.output, (n, r.output)


def test_unsupported_modules_listed_at_once_exit_3(tmp_path: Path) -> None:
    py = _write(tmp_path, "uns.py", """
import torch
from torch import nn

class Block(nn.Module):
    def __init__(self):
        super().__init__()
        self.cell = nn.Hardshrink()
        self.act = nn.CELU()

    def forward(self, x):
        h = self.cell(x)
        return self.act(h.unsqueeze(1))

class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.enc = Block()

    def forward(self, x):
        return self.enc(x)

def build():
    return Net()
""")
    out = tmp_path / "o.onnx"
    r = _invoke("export", "--untrained", f"{py}:build", "--input", "x:batch,4", "-o", str(out))
    assert r.exit_code == 3, r.output
    assert "enc.cell (Hardshrink)" in r.output and "enc.act (CELU)" in r.output
    assert "uns.py:12" in r.output and "uns.py:13" in r.output and "2 unsupported" in r.output
    assert not out.exists()


@pytest.mark.parametrize(("spec", "needle"), [
    ("y:batch,4", "takes x"), ("x", "expected NAME:DIM"), ("x:batch,0,4", "neither a positive integer"),
])
def test_bad_input_option_exit_2(spec: str, needle: str, good: dict[str, Path]) -> None:
    r = _invoke("export", "--untrained", f"{good['py']}:build", "--input", spec,
                "-o", str(good["dir"] / "o.onnx"))
    assert r.exit_code == 2 and needle in r.output, r.output


def test_input_that_cannot_be_inferred_asks_for_input(tmp_path: Path) -> None:
    py = _write(tmp_path, "scale.py", """
import torch
from torch import nn

class Net(nn.Module):
    def forward(self, x, y):
        return x * 2 + nn.functional.relu(y)

def build():
    return Net()
""")
    r = _invoke("export", "--untrained", f"{py}:build", "-o", str(tmp_path / "o.onnx"))
    assert r.exit_code == 2 and "x, y" in r.output and "--input" in r.output, r.output
    r = _invoke("export", "--untrained", f"{py}:build", "--input", "x:batch,3", "--input", "y:batch,3",
                "-o", str(tmp_path / "o.onnx"))
    assert r.exit_code == 0, r.output


def test_wrong_input_shape_is_exit_2_with_the_failing_line(good: dict[str, Path]) -> None:
    r = _invoke("export", "--untrained", f"{good['py']}:build", "--input", "x:batch,time,5",
                "-o", str(good["dir"] / "o.onnx"))
    assert r.exit_code == 2 and "sample inputs (x: [3, 13, 5])" in r.output and "net.py:" in r.output, r.output
