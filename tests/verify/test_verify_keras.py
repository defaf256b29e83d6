"""verify on Keras models: honest exports pass; planted export bugs fail at the right probe and step.

The planted bugs edit the ONNX file of an honest export (never the exporter), in the middle
layer of a three-layer stack, so "first divergence" has a layer before it that must still pass.
Expected steps come from the ONNX GRU equations (operator spec): with a zero initial state
``H_prev = 0``, so at step 0 the recurrent weight R only enters through ``R·H_prev = 0`` —
a perturbed R can first show at step 1, while W, the biases and linear_before_reset already act
at step 0.
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
from seqgate.onnxfile.probes import read_probe_map
from seqgate.verify.run import verify_model

H = 6
runner = CliRunner()


@pytest.fixture(scope="module")
def stack(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    from keras_models import keras, randomize

    k = keras()
    d = tmp_path_factory.mktemp("stack")
    inp = k.Input((None, 3), name="x")
    h = k.layers.LSTM(5, return_sequences=True, name="first")(inp)
    h = k.layers.GRU(H, return_sequences=True, name="middle")(h)  # reset_after=True: linear_before_reset=1
    h = k.layers.LSTM(4, name="last")(h)
    out = k.layers.Dense(3, activation="softmax", name="probs")(h)
    model = randomize(k.Model(inp, out), np.random.default_rng(7))
    model.save(d / "m.keras")
    from seqgate.export.run import export_source

    export_source(d / "m.keras", d / "m.onnx")
    np.savez(d / "rec.npz", x=np.random.default_rng(8).normal(size=(24, 9, 3)).astype(np.float32))
    return {"dir": d, "keras": d / "m.keras", "onnx": d / "m.onnx", "rec": d / "rec.npz"}


def _tamper(stack: dict[str, Path], name: str, edit: Any) -> Path:
    m = onnx.load(str(stack["onnx"]))
    node = next(n for n in m.graph.node if n.op_type == "GRU")
    assert "middle" in node.name
    inits = {i.name: i for i in m.graph.initializer}
    edit(node, inits)
    out = stack["dir"] / f"{name}.onnx"
    onnx.save(m, str(out))
    return out


def _set(inits: dict[str, Any], name: str, value: np.ndarray) -> None:
    inits[name].CopyFrom(numpy_helper.from_array(value.astype(np.float32), name))


def _perturb_r(node: Any, inits: dict[str, Any]) -> None:
    r = numpy_helper.to_array(inits[node.input[2]]).copy()
    r[0, 2 * H + 1, 3] += 0.05  # one weight of the candidate gate h
    _set(inits, node.input[2], r)


def _swap_gates(node: Any, inits: dict[str, Any]) -> None:
    w = numpy_helper.to_array(inits[node.input[1]]).copy()
    w[0, : 2 * H] = np.concatenate([w[0, H:2 * H], w[0, :H]])  # z ↔ r
    _set(inits, node.input[1], w)


def _swap_bias_halves(node: Any, inits: dict[str, Any]) -> None:
    b = numpy_helper.to_array(inits[node.input[3]]).copy()
    _set(inits, node.input[3], np.concatenate([b[:, 3 * H:], b[:, :3 * H]], axis=1))  # Wb ↔ Rb


def _flip_lbr(node: Any, inits: dict[str, Any]) -> None:
    a = next(a for a in node.attribute if a.name == "linear_before_reset")
    assert a.i == 1
    a.i = 0


def _reverse(node: Any, inits: dict[str, Any]) -> None:
    a = next(a for a in node.attribute if a.name == "direction")
    a.s = b"reverse"


@pytest.mark.parametrize("name, edit, step", [
    ("perturbed_weight", _perturb_r, 1),
    ("swapped_gates", _swap_gates, 0),
    ("swapped_bias_halves", _swap_bias_halves, 0),
    ("wrong_linear_before_reset", _flip_lbr, 0),
    ("reversed_direction", _reverse, None),
])
def test_planted_bug_is_caught_at_the_middle_layer(stack: dict[str, Path], name: str, edit: Any,
                                                   step: int | None) -> None:
    bad = _tamper(stack, name, edit)
    rep = verify_model(bad, str(stack["keras"]), recordings=[stack["rec"]], batch_size=16)
    assert not rep.passed and rep.exit_code == 1
    fd = rep.first_divergence
    assert fd is not None
    assert fd["tensor"] == "middle/forward/hidden_sequence" and fd["layer"] == "middle"
    if step is not None:
        assert fd["step"] == step
    by_name = {t["name"]: t for t in rep.tensors}
    assert all(t["passed"] for n, t in by_name.items() if n.startswith("first/"))
    assert "middle/forward/hidden_sequence" in rep.headline()


def test_honest_export_passes_with_every_tensor_compared(stack: dict[str, Path]) -> None:
    rep = verify_model(stack["onnx"], str(stack["keras"]), recordings=[stack["rec"]], synthetic=True,
                       batch_size=10, oracle=True, seed=3)
    assert rep.passed, rep.headline()
    names = [t["name"] for t in rep.tensors]
    probes = [p.name for p in read_probe_map(onnx.load(str(stack["onnx"])))]
    assert names == [*probes, "probs"]
    assert {t["kind"] for t in rep.tensors} == {"hidden_sequence", "hidden_final", "cell_final", "output"}
    kinds = [r["kind"] for r in rep.recordings]
    assert kinds == ["recorded", "synthetic:scaled", "synthetic:zeros", "synthetic:constants",
                     "synthetic:extremes", "synthetic:long"]
    seq = next(t for t in rep.tensors if t["name"] == "middle/forward/hidden_sequence")
    assert len(seq["per_step_max_abs"]) == 36  # the long synthetic set has 4 × 9 steps
    assert len(seq["by_recording"][str(stack["rec"])]["per_step_max_abs"]) == 9
    out = next(t for t in rep.tensors if t["name"] == "probs")
    assert out["metrics"]["top1_agreement"] == 1.0  # softmax output detected as class scores
    assert rep.oracle is not None and rep.oracle["ran"]
    assert all(t["verdict"] == "agree" for w in rep.oracle["windows"] for t in w["tensors"])
    assert rep.seed == 3 and rep.model["sha256"] and rep.recordings[0]["sha256"]


def test_cli_reports_and_exit_codes(stack: dict[str, Path]) -> None:
    d = stack["dir"]
    bad = _tamper(stack, "cli_bad", _swap_gates)
    args = ["verify", str(bad), "--source", str(stack["keras"]), "--recording", str(stack["rec"]), "--quiet",
            "--report", str(d / "r.json"), "--junit", str(d / "j.xml"), "--summary", str(d / "s.md")]
    r = runner.invoke(app, args)
    assert r.exit_code == 1, r.output
    assert "first divergence at hidden_sequence 'middle/forward/hidden_sequence'" in r.output
    doc = json.loads((d / "r.json").read_text())
    assert doc["schema"] == "seqgate.verify/1" and doc["passed"] is False
    assert doc["first_divergence"]["tensor"] == "middle/forward/hidden_sequence"
    for key in ("tensors", "recordings", "environment", "seqgate_version", "seed", "model"):
        assert key in doc
    t = doc["tensors"][0]
    for key in ("name", "kind", "layer", "direction", "metrics", "atol", "rtol", "passed", "per_step_max_abs"):
        assert key in t
    import xml.etree.ElementTree as ET

    suite = ET.parse(d / "j.xml").getroot().find("testsuite")
    assert suite is not None and int(suite.get("tests", 0)) == len(doc["tensors"])
    failed = [c.get("name") for c in suite.iter("testcase") if c.find("failure") is not None]
    assert "middle/forward/hidden_sequence" in failed and "first/forward/hidden_sequence" not in failed
    assert "**fail**" in (d / "s.md").read_text()  # the per-tensor verdict word of every report
    # --no-states: the outputs alone still show the bug; a loose --atol lets everything pass
    r = runner.invoke(app, [*args[:6], "--quiet", "--no-states"])
    assert r.exit_code == 1 and "'probs'" in r.output
    r = runner.invoke(app, [*args[:6], "--quiet", "--atol", "10"])
    assert r.exit_code == 0, r.output


def test_cli_bad_inputs_exit_2(stack: dict[str, Path], tmp_path: Path) -> None:
    base = ["verify", str(stack["onnx"]), "--source", str(stack["keras"]), "--quiet"]
    r = runner.invoke(app, base)
    assert r.exit_code == 2 and "nothing to compare" in r.output
    np.savez(tmp_path / "wrong.npz", x=np.zeros((2, 9, 4), np.float32))
    r = runner.invoke(app, [*base, "--recording", str(tmp_path / "wrong.npz")])
    assert r.exit_code == 2 and "axis 2 has 4" in r.output
    x = np.zeros((5, 9, 3), np.float32)
    x[3, 1, 1] = np.nan
    np.savez(tmp_path / "nan.npz", x=x)
    r = runner.invoke(app, [*base, "--recording", str(tmp_path / "nan.npz")])
    assert r.exit_code == 2 and "window 3 holds NaN" in r.output
    r = runner.invoke(app, [*base, "--recording", str(stack["rec"]), "--batch-size", "0"])
    assert r.exit_code == 2 and "--batch-size" in r.output


def test_nested_bidirectional_backwards_and_initial_state_pass(tmp_path: Path) -> None:
    """The state capture's alignment (flips, halves of initial_state, nesting) on an honest export."""
    from keras_models import keras, randomize

    k = keras()
    inner_in = k.Input((None, 4))
    inner = k.Model(inner_in, k.layers.GRU(3, return_sequences=True, go_backwards=True, name="g")(inner_in),
                    name="enc")
    x = k.Input((None, 4), name="x")
    s = k.Input((2,), name="s")
    h0 = k.layers.Dense(3, name="init")(s)
    seq = inner(x)
    bi = k.layers.Bidirectional(k.layers.LSTM(3, return_sequences=True), merge_mode="ave", name="bi")(
        seq, initial_state=[h0, h0, h0, h0])
    y = k.layers.SimpleRNN(2, go_backwards=True, return_sequences=True, name="r")(bi)
    model = randomize(k.Model([x, s], y), np.random.default_rng(2))
    model.save(tmp_path / "n.keras")
    from seqgate.export.run import export_source

    export_source(tmp_path / "n.keras", tmp_path / "n.onnx")
    rng = np.random.default_rng(4)
    np.savez(tmp_path / "r.npz", x=rng.normal(size=(6, 7, 4)).astype(np.float32),
             s=rng.normal(size=(6, 2)).astype(np.float32))
    rep = verify_model(tmp_path / "n.onnx", str(tmp_path / "n.keras"), recordings=[tmp_path / "r.npz"])
    assert rep.passed, rep.headline()
    names = {t["name"] for t in rep.tensors}
    assert {"enc/g/reverse/hidden_sequence", "bi/forward/cell_final", "bi/reverse/hidden_sequence",
            "r/reverse/hidden_sequence"} <= names
    # the output 'r' is time-indexed (return_sequences): it has a drift curve
    assert len(next(t for t in rep.tensors if t["kind"] == "output")["per_step_max_abs"]) == 7
