"""``seqgate inspect``: the table and ``--json``, costs worked by hand, and its bad inputs.

MACs per step are worked out from the equations (reference_equations.py): every gate's
pre-activation is ``W_g·x_t + R_g·h_{t−1}``, i.e. ``H·I + H·H`` multiply-accumulates per gate,
so one step costs ``G·H·(I + H)`` per direction (LSTM G = 4, GRU 3, RNN 1).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import pytest
from onnx import helper
from typer.testing import CliRunner

import keras_models as km
from seqgate.cli.app import app

pytestmark = pytest.mark.filterwarnings("ignore:__array__ implementation:DeprecationWarning")
runner = CliRunner()
I, H_LSTM, H_GRU, OUT = 3, 5, 4, 2  # noqa: E741  (I = input size, the papers' letter)


@pytest.fixture(scope="module")
def exported(tmp_path_factory: pytest.TempPathFactory) -> Path:
    from seqgate.export.run import export_source

    k = km.keras()
    L = k.layers
    rng = np.random.default_rng(5)

    def body(x: Any) -> list[Any]:
        y = L.LSTM(H_LSTM, return_sequences=True, name="lstm")(x)
        per_step = L.TimeDistributed(L.Dense(OUT), name="td")(y)
        last = L.Bidirectional(L.GRU(H_GRU), name="bigru")(y)
        return [per_step, L.Dense(OUT, name="head")(last)]

    model = km.functional((None, I), body, rng, name="costs")
    d = tmp_path_factory.mktemp("inspect")
    src = km.save(model, d / "costs.keras")
    export_source(str(src), d / "costs.onnx")
    return d / "costs.onnx"


def _json(path: Path) -> dict[str, Any]:
    r = runner.invoke(app, ["inspect", str(path), "--json"])
    assert r.exit_code == 0, r.output
    return json.loads(r.output)


def test_json_layers_and_costs(exported: Path) -> None:
    info = _json(exported)
    rows = {r["layer"]: r for r in info["layers"]}
    # LSTM: 4 gates · H · (I + H) = 4·5·(3 + 5) = 160 MACs per step (worked by hand)
    assert rows["lstm"]["macs_per_step"] == 4 * H_LSTM * (I + H_LSTM) == 160
    assert rows["lstm"]["macs_per_sequence"] == 0
    assert "LSTM" in rows["lstm"]["nodes"]
    # ONNX weights of the node: W [1,4H,I] + R [1,4H,H] + B [1,8H] (ONNX keeps both bias halves)
    assert rows["lstm"]["params"] == 4 * H_LSTM * I + 4 * H_LSTM * H_LSTM + 8 * H_LSTM == 200
    # Bidirectional GRU over the LSTM's H features: 2 · 3 · H_g · (H_l + H_g) = 2·3·4·9 = 216
    assert rows["bigru"]["macs_per_step"] == 2 * 3 * H_GRU * (H_LSTM + H_GRU) == 216
    # a Dense on every step costs H·OUT per step; a head on the final state costs once
    assert rows["td"]["macs_per_step"] == H_LSTM * OUT and rows["td"]["macs_per_sequence"] == 0
    assert rows["head"]["macs_per_step"] == 0 and rows["head"]["macs_per_sequence"] == 2 * H_GRU * OUT
    assert rows["head"]["params"] == 2 * H_GRU * OUT + OUT
    assert info["totals"]["macs_per_step"] == sum(r["macs_per_step"] for r in info["layers"])


def test_json_io_probes_metadata(exported: Path) -> None:
    info = _json(exported)
    assert [(t["name"], t["dims"]) for t in info["inputs"]] == [("x", ["batch", "time", I])]
    assert [t["name"] for t in info["outputs"]] == ["td", "head"]
    assert info["opset"] == 17
    names = {p["name"] for p in info["probes"]}
    assert names == {"lstm/forward/hidden_sequence", "lstm/forward/hidden_final", "lstm/forward/cell_final",
                     "bigru/forward/hidden_sequence", "bigru/forward/hidden_final",
                     "bigru/reverse/hidden_sequence", "bigru/reverse/hidden_final"}
    assert {"seqgate.version", "seqgate.source.framework", "seqgate.source.sha256"} <= set(info["metadata"])
    assert "seqgate.probes" not in info["metadata"]


def test_table_output(exported: Path) -> None:
    r = runner.invoke(app, ["inspect", str(exported)])
    assert r.exit_code == 0, r.output
    for needle in ("layers", "lstm", "bigru", "LSTM", "GRU", "160", "probes (7)", "lstm/forward/cell_final",
                   "seqgate.source.sha256", "batch", "time"):
        assert needle in r.output, needle


def test_fixed_time_lstm_costs(tmp_path: Path) -> None:
    from seqgate.export.run import export_source

    rng = np.random.default_rng(1)
    model = km.functional((12, I), lambda x: km.recurrent("lstm", H_LSTM, name="lstm")(x), rng, name="fixed")
    src = km.save(model, tmp_path / "fixed.keras")
    export_source(str(src), tmp_path / "fixed.onnx")
    (row,) = [r for r in _json(tmp_path / "fixed.onnx")["layers"] if r["layer"] == "lstm"]
    assert row["macs_per_step"] == 160


def test_foreign_onnx_file(tmp_path: Path) -> None:
    """A file not written by seqgate: no probes, every node under graph glue."""
    node = helper.make_node("Relu", ["x"], ["y"], name="relu")
    g = helper.make_graph([node], "g", [helper.make_tensor_value_info("x", onnx.TensorProto.FLOAT, [1, 2])],
                          [helper.make_tensor_value_info("y", onnx.TensorProto.FLOAT, [1, 2])])
    onnx.save(helper.make_model(g, opset_imports=[helper.make_opsetid("", 17)]), str(tmp_path / "f.onnx"))
    info = _json(tmp_path / "f.onnx")
    assert info["probes"] == [] and [r["layer"] for r in info["layers"]] == ["(graph glue)"]


@pytest.mark.parametrize("content", [None, b"", b"\x08\x07garbage" * 20])
def test_bad_files(content: bytes | None, tmp_path: Path) -> None:
    p = tmp_path / "m.onnx"
    if content is not None:
        p.write_bytes(content)
    r = runner.invoke(app, ["inspect", str(p)])
    assert r.exit_code == 2, r.output
    assert "error:" in r.output and "Traceback" not in r.output


def test_truncated_export(exported: Path, tmp_path: Path) -> None:
    p = tmp_path / "cut.onnx"
    p.write_bytes(exported.read_bytes()[:500])
    r = runner.invoke(app, ["inspect", str(p), "--json"])
    assert r.exit_code == 2, r.output
    assert "Traceback" not in r.output


def test_inspect_refuses_files_that_are_not_onnx(tmp_path: Path) -> None:
    from typer.testing import CliRunner

    from seqgate.cli.app import app

    keras_file = tmp_path / "model.keras"
    keras_file.write_bytes(b"PK\x03\x04")
    r = CliRunner().invoke(app, ["inspect", str(keras_file)])
    assert r.exit_code == 2 and "not an ONNX file" in r.output and "export the model first" in r.output
    junk = tmp_path / "model.onnx"
    junk.write_bytes(b"\x00\xffnot protobuf at all")
    r = CliRunner().invoke(app, ["inspect", str(junk)])
    assert r.exit_code == 2 and "not a readable ONNX model" in r.output
    assert "Traceback" not in r.output


def test_a_module_called_twice_counts_its_parameters_once(tmp_path: Path) -> None:
    """Reference: PyTorch's own count, ``sum(p.numel() for p in module.parameters())``."""
    import importlib.util

    import torch

    from seqgate.export.run import export_source

    body = '''
import torch
from torch import nn


class Twice(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(4, 8, batch_first=True)
        self.fc = nn.Linear(8, 8)

    def forward(self, x):
        out, _ = self.lstm(x)
        return self.fc(torch.relu(self.fc(out[:, -1])))


def build():
    return Twice()
'''
    py = tmp_path / "twice.py"
    py.write_text(body)
    torch.manual_seed(0)
    spec = importlib.util.spec_from_file_location("twice_ref", py)
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    module = mod.build()
    pt = tmp_path / "twice.pt"
    torch.save(module.state_dict(), pt)
    out = tmp_path / "twice.onnx"
    export_source(f"{py}:build", out, weights=str(pt))
    r = runner.invoke(app, ["inspect", str(out), "--json"])
    assert r.exit_code == 0, r.output
    assert json.loads(r.output)["totals"]["params"] == sum(p.numel() for p in module.parameters())
    # the file holds the shared Linear weight once
    weights = [i for i in onnx.load(str(out)).graph.initializer if list(i.dims) == [8, 8]]
    assert len(weights) == 1
