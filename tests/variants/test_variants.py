"""Reduced-precision variants: the rule setting, the exact scan form, what the quantizer did, and
verification under a variant's rule (a destroyed layer is caught; figures recomputed here).

References: the ONNX GRU-14 / RNN-14 equations as written independently in
``tests/reference_equations.py`` (float64 NumPy) for the scan form; NumPy on the outputs of
PyTorch and ONNX Runtime, computed in this file, for the report's task-level figures.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from reference_equations import onnx_gru, onnx_rnn
from seqgate.errors import BadInputError
from seqgate.settings import VariantRule, parse_variants

torch = pytest.importorskip("torch")

NET = '''
import torch
from torch import nn


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.enc = nn.LSTM(4, 32, num_layers=2, batch_first=True)
        self.head = nn.Linear(32, 3)

    def forward(self, x):
        y, _ = self.enc(x)
        return torch.softmax(self.head(y[:, -1]) * 4.0, dim=-1)


class Reg(nn.Module):
    def __init__(self):
        super().__init__()
        self.gru = nn.GRU(4, 16, batch_first=True)
        self.head = nn.Linear(16, 1)

    def forward(self, x):
        y, _ = self.gru(x)
        return self.head(y[:, -1])


def make():
    torch.manual_seed(3)
    return Net()


def make_reg():
    torch.manual_seed(4)
    return Reg()
'''


# ----- the [[variants]] setting --------------------------------------------------------------
def test_rules_parse_and_every_problem_is_named() -> None:
    rules = parse_variants([{"kind": "int8_dynamic", "min_top1_agreement": 0.99, "required": True},
                            {"kind": "float16", "atol": 1e-3}])
    assert rules == (VariantRule("int8_dynamic", min_top1_agreement=0.99, required=True),
                     VariantRule("float16", atol=1e-3))
    with pytest.raises(BadInputError) as ei:
        parse_variants([{"kind": "int4", "atol": 1e-3}, {"kind": "float16"},
                        {"kind": "float16", "min_top1_agreement": 1.5, "atlo": 1}])
    text = str(ei.value)
    assert "entry 1: kind 'int4': choose one of int8_dynamic" in text
    assert "entry 2: give an acceptance rule" in text
    assert "entry 3: min_top1_agreement must be a fraction in 0..1" in text
    assert "unknown key in [[variants]] entry 3: 'atlo' (did you mean 'atol'?)" in text


def test_same_kind_twice_is_refused() -> None:
    with pytest.raises(BadInputError, match="kind 'float16' is listed twice"):
        parse_variants([{"kind": "float16", "atol": 1.0}, {"kind": "float16", "atol": 2.0}])


# ----- the scan form against the published equations -----------------------------------------
def _single_node_model(op: str, direction: str, h: int, lbr: int, act: str, with_b: bool, with_h0: bool,
                       rng: np.random.Generator) -> tuple[Any, dict[str, np.ndarray], dict[str, Any]]:
    d, g, i = (2 if direction == "bidirectional" else 1), (3 if op == "GRU" else 1), 5
    w = rng.uniform(-0.6, 0.6, (d, g * h, i)).astype(np.float32)
    r = rng.uniform(-0.6, 0.6, (d, g * h, h)).astype(np.float32)
    b = rng.uniform(-0.3, 0.3, (d, 2 * g * h)).astype(np.float32)
    inits = [numpy_helper.from_array(w, "W"), numpy_helper.from_array(r, "R")]
    inputs = ["X", "W", "R"]
    if with_b:
        inits.append(numpy_helper.from_array(b, "B"))
    inputs += ["B" if with_b else "", "", "h0" if with_h0 else ""]
    attrs: dict[str, Any] = {"hidden_size": h, "direction": direction}
    if op == "GRU":
        attrs["linear_before_reset"] = lbr
    else:
        attrs["activations"] = [act] * d
    node = helper.make_node(op, inputs, ["Y", "Y_h"], name="rec", **attrs)
    graph_in = [helper.make_tensor_value_info("X", TensorProto.FLOAT, ["T", "N", i])]
    if with_h0:
        graph_in.append(helper.make_tensor_value_info("h0", TensorProto.FLOAT, [d, "N", h]))
    graph = helper.make_graph([node], "g", graph_in, [
        helper.make_tensor_value_info("Y", TensorProto.FLOAT, ["T", d, "N", h]),
        helper.make_tensor_value_info("Y_h", TensorProto.FLOAT, [d, "N", h])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    feeds = {"X": rng.normal(0, 1, (7, 3, i)).astype(np.float32)}
    if with_h0:
        feeds["h0"] = rng.normal(0, 0.5, (d, 3, h)).astype(np.float32)
    return model, feeds, {"W": w, "R": r, "B": b if with_b else None}


@pytest.mark.parametrize(("op", "direction", "lbr", "act", "with_b", "with_h0"), [
    ("GRU", "forward", 1, "", True, False),
    ("GRU", "reverse", 0, "", True, True),
    ("GRU", "bidirectional", 1, "", False, True),
    ("GRU", "bidirectional", 0, "", True, False),
    ("RNN", "forward", 0, "Tanh", True, True),
    ("RNN", "bidirectional", 0, "Relu", False, False),
])
def test_scan_form_computes_the_operator_equations(op: str, direction: str, lbr: int, act: str,
                                                    with_b: bool, with_h0: bool) -> None:
    import onnxruntime as ort

    from seqgate.variants.scanform import scan_form

    rng = np.random.default_rng(5)
    model, feeds, p = _single_node_model(op, direction, 6, lbr, act, with_b, with_h0, rng)
    rewritten, done, notes = scan_form(model)
    onnx.checker.check_model(rewritten)
    assert done == ["rec"] and not notes
    assert {n.op_type for n in rewritten.graph.node} >= {"MatMul", "Scan"}
    assert not any(n.op_type in ("GRU", "RNN") for n in rewritten.graph.node)
    y, yh = ort.InferenceSession(rewritten.SerializeToString()).run(["Y", "Y_h"], feeds)
    x64 = feeds["X"].astype(np.float64)
    h0 = feeds.get("h0")
    if op == "GRU":  # ONNX GRU-14 equations (reference_equations.onnx_gru)
        ry, ryh = onnx_gru(x64, p["W"], p["R"], p["B"], initial_h=h0, direction=direction,
                           linear_before_reset=lbr)
    else:  # ONNX RNN-14 equations (reference_equations.onnx_rnn)
        ry, ryh = onnx_rnn(x64, p["W"], p["R"], p["B"], initial_h=h0, direction=direction,
                           activations=[act] * (2 if direction == "bidirectional" else 1))
    # float32 evaluation of the same equations: a few ulps at these magnitudes (≤ ~1e-6)
    np.testing.assert_allclose(y, ry, atol=2e-6, rtol=0)
    np.testing.assert_allclose(yh, ryh, atol=2e-6, rtol=0)


def test_scan_form_leaves_what_it_cannot_write_exactly() -> None:
    from seqgate.variants.scanform import scan_form

    model, _, _ = _single_node_model("GRU", "forward", 4, 1, "", True, False, np.random.default_rng(1))
    node = model.graph.node[0]
    node.attribute.append(helper.make_attribute("clip", 2.0))
    rewritten, done, notes = scan_form(model)
    assert done == [] and "kept as it is: clip" in notes[0]
    assert rewritten.graph.node[0].op_type == "GRU"


# ----- a source model, its export and recordings ------------------------------------------------
@pytest.fixture(scope="module")
def src(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    d = tmp_path_factory.mktemp("variants")
    (d / "net.py").write_text(NET)
    spec = importlib.util.spec_from_file_location("seqgate_test_variant_net", d / "net.py")
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    out: dict[str, Any] = {"dir": d, "mod": mod}
    for factory, name in (("make", "cls"), ("make_reg", "reg")):
        net = getattr(mod, factory)()
        torch.save(net.state_dict(), d / f"{name}.pt")
        out[f"{name}_net"] = net.eval()
    rng = np.random.default_rng(0)
    x = rng.normal(0, 1, (150, 20, 4)).astype(np.float32)
    np.savez(d / "windows.npz", x=x)
    with torch.no_grad():
        y = out["reg_net"](torch.from_numpy(x)).numpy()
    targets = (y + rng.normal(0, 0.1, y.shape)).astype(np.float32)  # a forecast with noise
    np.savez(d / "forecast.npz", x=x, targets=targets)
    out["x"], out["targets"] = x, targets
    return out


def _export(src: dict[str, Any], factory: str, name: str) -> Any:
    from seqgate.export.run import export_source

    d = src["dir"]
    export_source(f"{d / 'net.py'}:{factory}", d / f"{name}.onnx", weights=str(d / f"{name}.pt"), force=True)
    return onnx.load(d / f"{name}.onnx")


def _options(src: dict[str, Any], factory: str, name: str, rec: str, task: str) -> dict[str, Any]:
    d = src["dir"]
    return {"source": f"{d / 'net.py'}:{factory}", "weights": str(d / f"{name}.pt"),
            "recordings": [str(d / rec)], "task": task}


def test_dynamic_int8_quantizes_lstm_and_keeps_the_probe_map(src: dict[str, Any]) -> None:
    from seqgate.onnxfile.probes import read_probe_map
    from seqgate.variants.make import make_variant

    model = _export(src, "make", "cls")
    before = model.SerializeToString()
    v = make_variant(model, "int8_dynamic")
    assert model.SerializeToString() == before  # the float32 model is not touched
    ops = [n.op_type for n in v.model.graph.node]
    # FACTS.md (measured): quantize_dynamic turns LSTM into DynamicQuantizeLSTM, MatMul into MatMulInteger
    assert ops.count("DynamicQuantizeLSTM") == 2 and "LSTM" not in ops and "MatMulInteger" in ops
    assert {n["precision"] for n in v.nodes} == {"int8"}
    names = {n.name for n in v.model.graph.node}
    assert all(p.node in names for p in read_probe_map(v.model))


def _planted(model: Any) -> Any:
    """The int8 variant with layer 1's quantized input and recurrent weights zeroed."""
    from seqgate.variants.make import make_variant

    v = make_variant(model, "int8_dynamic").model
    node = [n for n in v.graph.node if n.op_type == "DynamicQuantizeLSTM"][1]
    inits = {i.name: i for i in v.graph.initializer}
    for name in node.input[1:3]:  # W, R in their quantized form (contrib op: X, W, R, B, ...)
        arr = numpy_helper.to_array(inits[name])
        inits[name].CopyFrom(numpy_helper.from_array(np.zeros_like(arr), name))
    return v


def test_a_destroyed_layer_is_caught_by_the_variant_check(src: dict[str, Any]) -> None:
    from seqgate.variants.check import verify_variant
    from seqgate.variants.make import make_variant

    model = _export(src, "make", "cls")
    rule = VariantRule("int8_dynamic", atol=0.05, min_top1_agreement=0.95)
    opts = _options(src, "make", "cls", "windows.npz", "classify")
    honest = src["dir"] / "honest.onnx"
    honest.write_bytes(make_variant(model, "int8_dynamic").model.SerializeToString())
    ok = verify_variant(honest, rule, opts)
    assert ok["passed"], ok["checks"]
    bad_path = src["dir"] / "planted.onnx"
    bad_path.write_bytes(_planted(model).SerializeToString())
    bad = verify_variant(bad_path, rule, opts)
    assert not bad["passed"]
    tol = next(c for c in bad["checks"] if c["name"] == "tolerance")
    assert not tol["passed"]
    first = bad["verify"]["first_divergence"]
    assert first["layer"] == "enc" and "/l1/" in first["tensor"]  # layer 0's probes still agree
    layer0 = [t for t in bad["verify"]["tensors"] if "/l0/" in t["name"]]
    assert layer0 and all(t["passed"] for t in layer0)


def _batched(model: Any, x: np.ndarray, batch: int = 64) -> np.ndarray:
    """ONNX Runtime on ``x`` in verify's batches: dynamic INT8 picks its activation scale per call,
    so a variant's outputs depend on which windows share a call (the verify batch size)."""
    import onnxruntime as ort

    from seqgate.verify.pipeline import thread_plan

    # Measured here: the dynamic-INT8 kernels give results that depend on the intra-op thread
    # count, so the session runs with the threads verify gives onnxruntime.
    so = ort.SessionOptions()
    so.intra_op_num_threads = thread_plan().onnx
    sess = ort.InferenceSession(model.SerializeToString(), so, providers=["CPUExecutionProvider"])
    parts = [sess.run(None, {"x": x[i:i + batch]})[0] for i in range(0, len(x), batch)]
    return np.concatenate(parts).astype(np.float64)


def test_accepted_figures_match_numpy_on_both_runtimes(src: dict[str, Any]) -> None:
    from seqgate.variants.check import verify_variant
    from seqgate.variants.make import make_variant

    model = _export(src, "make", "cls")
    variant = make_variant(model, "int8_dynamic").model
    path = src["dir"] / "accepted.onnx"
    path.write_bytes(variant.SerializeToString())
    res = verify_variant(path, VariantRule("int8_dynamic", min_top1_agreement=0.9),
                         _options(src, "make", "cls", "windows.npz", "classify"))
    assert res["passed"]
    # independent computation: PyTorch module and an ONNX Runtime session, compared with NumPy
    with torch.no_grad():
        ref = src["cls_net"](torch.from_numpy(src["x"])).numpy().astype(np.float64)
    got = _batched(variant, src["x"])
    same = np.argmax(got, -1) == np.argmax(ref, -1)
    f = res["figures"]
    assert f["recorded_windows"] == 150
    assert f["top1_agreement"] == pytest.approx(same.mean(), abs=1e-12)
    assert f["label_flips"] == int((~same).sum())
    assert f["output_max_abs"] == pytest.approx(float(np.abs(got - ref).max()), rel=1e-5)
    drift = f["drift"]
    assert set(drift) == {"enc/l0/forward/hidden_sequence", "enc/l1/forward/hidden_sequence"}
    assert all(len(c) == 20 for c in drift.values())


def test_forecast_error_change_matches_numpy(src: dict[str, Any]) -> None:
    from seqgate.variants.check import verify_variant
    from seqgate.variants.make import make_variant

    model = _export(src, "make_reg", "reg")
    variant = make_variant(model, "int8_dynamic_scan").model
    path = src["dir"] / "reg_scan.onnx"
    path.write_bytes(variant.SerializeToString())
    res = verify_variant(path, VariantRule("int8_dynamic_scan", max_forecast_error_increase=0.5),
                         _options(src, "make_reg", "reg", "forecast.npz", "regress"))
    with torch.no_grad():
        ref = src["reg_net"](torch.from_numpy(src["x"])).numpy().astype(np.float64)
    got = _batched(variant, src["x"])
    y = src["targets"].astype(np.float64)
    mae_s, mae_v = np.abs(ref - y).mean(), np.abs(got - y).mean()
    fc = res["figures"]["forecast"]
    assert fc["values"] == 150
    assert fc["source_mae"] == pytest.approx(mae_s, rel=1e-6)
    assert fc["variant_mae"] == pytest.approx(mae_v, rel=1e-6)
    assert fc["relative_increase"] == pytest.approx((mae_v - mae_s) / mae_s, rel=1e-5, abs=1e-9)
    assert res["checks"][-1]["name"] == "forecast_error"


def test_a_task_threshold_without_a_task_fails_naming_why(src: dict[str, Any]) -> None:
    from seqgate.variants.check import judge

    figures = {"max_abs": 0.01, "top1_agreement": None, "label_flips": None, "forecast": None,
               "recorded_windows": 10}
    checks = judge(VariantRule("int8_dynamic", min_top1_agreement=0.9, max_forecast_error_increase=0.1),
                   True, figures)
    assert [c["passed"] for c in checks] == [True, False, False]
    assert "no class-score output" in checks[1]["detail"]
    assert "no recording with a targets array" in checks[2]["detail"]


def test_unknown_variant_key_in_a_gate_config_is_bad_input(tmp_path: Path) -> None:
    from seqgate.gate.config import load_gate_config

    (tmp_path / "m.keras").write_bytes(b"x")
    (tmp_path / "g.toml").write_text('[model]\nsource = "m.keras"\n[verify]\nsynthetic = true\n'
                                     '[[variants]]\nkind = "int8_dynamic"\nmin_top1 = 0.9\n')
    with pytest.raises(BadInputError, match="unknown key in \\[\\[variants\\]\\] entry 1: 'min_top1'"):
        load_gate_config(tmp_path / "g.toml")
