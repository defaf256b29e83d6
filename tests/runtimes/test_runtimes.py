"""One runner per framework: the output flattening rule, a dict-returning PyTorch model through
verify and profile, and a Keras layer name TensorFlow would refuse as a scope in every command."""

from __future__ import annotations

import json
import textwrap
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from typer.testing import CliRunner

from seqgate.cli.app import app
from seqgate.util.outputs import flatten_outputs, flatten_with_paths

runner = CliRunner()
FAST = ["--seq-lens", "5", "--min-runs", "3", "--min-time", "0", "--warmup", "1"]

DICT_NET = """
import torch
from torch import nn


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.rnn = nn.GRU(3, 5, batch_first=True)
        self.head = nn.Linear(5, 2)

    def forward(self, x):
        y, h = self.rnn(x)
        # keys out of alphabetical order on purpose: "z" [N, 2] first, then "a" [N, 5]
        return {"z": self.head(y[:, -1]), "a": y[:, -1]}


def build():
    torch.manual_seed(0)
    return Net()
"""

SCOPE_HOSTILE = 'encoder lstm (v2) "ü"'  # legal for Keras, refused by tf.name_scope (FACTS.md)


def _ok(args: list[str]) -> Any:
    r = runner.invoke(app, args)
    assert r.exit_code == 0, r.output
    assert "Traceback" not in r.output
    return r


def test_flatten_keeps_insertion_order_depth_first() -> None:
    # hand-worked: dict keys in the order they were inserted (Python 3.7+ dict semantics), never sorted
    result = {"z": 1, "a": (2, [3, 4]), "m": {"q": 5, "b": 6}}
    assert flatten_outputs(result) == [1, 2, 3, 4, 5, 6]
    assert [p for p, _ in flatten_with_paths(result)] == [
        ("z",), ("a", 0), ("a", 1, 0), ("a", 1, 1), ("m", "q"), ("m", "b")]
    assert flatten_with_paths(7) == [((), 7)]


@pytest.fixture(scope="module")
def dict_model(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    d = tmp_path_factory.mktemp("dictnet")
    (d / "net.py").write_text(textwrap.dedent(DICT_NET), encoding="utf-8")
    np.savez(d / "rec.npz", x=np.random.default_rng(0).normal(size=(8, 6, 3)).astype(np.float32))
    _ok(["export", f"{d / 'net.py'}:build", "-o", str(d / "net.onnx"), "--input", "x:batch,time,3",
         "--untrained"])
    return {"dir": d, "onnx": d / "net.onnx", "source": Path(f"{d / 'net.py'}:build"), "rec": d / "rec.npz"}


def test_dict_outputs_pass_verify_in_insertion_order(dict_model: dict[str, Path]) -> None:
    import onnx

    names = [o.name for o in onnx.load(str(dict_model["onnx"])).graph.output]
    assert names == ["z", "a"]
    report = dict_model["dir"] / "verify.json"
    _ok(["verify", str(dict_model["onnx"]), "--source", str(dict_model["source"]), "--recording",
         str(dict_model["rec"]), "--quiet", "--report", str(report)])
    tensors = {t["name"]: t for t in json.loads(report.read_text())["tensors"]}
    assert tensors["z"]["passed"] and tensors["a"]["passed"]


def test_dict_outputs_agree_in_profile_beside_the_source(dict_model: dict[str, Path]) -> None:
    report = dict_model["dir"] / "profile.json"
    _ok(["profile", str(dict_model["onnx"]), *FAST, "--source", str(dict_model["source"]),
         "--report", str(report), "--quiet"])
    data = json.loads(report.read_text())
    # before one flattener: profile sorted the keys ("a" then "z") and said the outputs differ
    assert data["source"]["outputs_agree"] is True, data["source"]["outputs_check"]
    assert not any("do not match" in n for n in data["notes"])


@pytest.fixture(scope="module")
def hostile_keras(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    from seqgate.util.frameworks import import_keras

    k = import_keras()
    d = tmp_path_factory.mktemp("names")
    x = k.Input((None, 3), name="x")
    y = k.layers.LSTM(4, return_sequences=True, name=SCOPE_HOSTILE)(x)
    y = k.layers.Dense(2, name="head [out]")(y)
    model = k.Model(x, y, name="model (v2)")
    rng = np.random.default_rng(5)
    model.set_weights([rng.uniform(-0.5, 0.5, w.shape).astype(np.float32) for w in model.get_weights()])
    model.save(d / "m.keras")
    np.savez(d / "rec.npz", x=rng.normal(size=(6, 7, 3)).astype(np.float32))
    _ok(["export", str(d / "m.keras"), "-o", str(d / "m.onnx")])
    return {"dir": d, "keras": d / "m.keras", "onnx": d / "m.onnx", "rec": d / "rec.npz"}


def test_scope_hostile_layer_name_verifies(hostile_keras: dict[str, Path]) -> None:
    report = hostile_keras["dir"] / "v.json"
    r = _ok(["verify", str(hostile_keras["onnx"]), "--source", str(hostile_keras["keras"]), "--recording",
             str(hostile_keras["rec"]), "--report", str(report)])
    data = json.loads(report.read_text())
    layers = {t["layer"] for t in data["tensors"] if t["kind"] != "output"}
    assert layers == {SCOPE_HOSTILE}
    assert {t["name"] for t in data["tensors"] if t["kind"] == "output"} == {"head [out]"}
    assert "head [out]" in " ".join(r.output.split())  # the table shows the name, brackets included


def test_scope_hostile_layer_name_profiles_beside_keras(hostile_keras: dict[str, Path]) -> None:
    report = hostile_keras["dir"] / "p.json"
    _ok(["profile", str(hostile_keras["onnx"]), *FAST, "--source", str(hostile_keras["keras"]),
         "--report", str(report), "--quiet"])
    assert json.loads(report.read_text())["source"]["outputs_agree"] is True


def test_scope_hostile_layer_name_in_inspect(hostile_keras: dict[str, Path]) -> None:
    r = _ok(["inspect", str(hostile_keras["onnx"])])
    flat = " ".join(r.output.split())
    assert "head [out]" in flat  # read as markup before: shown as "head"
    assert "(v2)" in flat and '"ü"' in flat
