"""The long-stream check: streams 10× the window through a streaming file and the source framework.

Independent references: the NumPy float64 implementations of the published recurrences in
``tests/reference_equations.py`` (LSTM: Hochreiter & Schmidhuber 1997 with the forget gate of
Gers et al. 2000; GRU: Cho et al. 2014; Elman RNN: Elman 1990, as the ONNX spec writes them) and
``tests/torch_reference.py`` (PyTorch's documented nn.LSTM / nn.GRU / nn.RNN equations), each
run over the whole long stream in one pass. The streamed ONNX file is driven here by a loop of
this test (the ``seqgate.streaming`` pairs fed back), not by the code under test. Planted bugs
are edits of the ONNX graph made here.
"""

from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import keras_models as km
import reference_equations as ref
import torch_models as tm
import torch_reference as tref
from seqgate.export.streaming import STREAMING_KEY, make_streaming, ordinary_view
from seqgate.onnxfile.probes import read_metadata, read_probe_map
from seqgate.settings import Tolerances
from seqgate.verify.long_inputs import from_recording
from seqgate.verify.long_stream import binned, long_stream_check, per_step
from seqgate.verify.recordings import MappedArray, Recording, input_specs

Array = np.ndarray[Any, Any]
TOL = Tolerances(1e-4, 1e-4, ())
T, FACTOR = 8, 10  # window length, long stream = 80 steps


# ----- helpers ---------------------------------------------------------------------------------
def _recording(x: Array, label: str = "rec") -> Recording:
    return Recording(label, "recorded", {"x": MappedArray(x, f"{label} 'x'")}, x.shape[0])


def _keras_stack(kind: str, rng: np.random.Generator, stateful: bool = False,
                 sizes: tuple[int, int] = (5, 4)) -> Any:
    L = km.keras().layers
    extra = {"stateful": True} if stateful else {}

    def body(x: Any) -> Any:
        first = km.recurrent(kind, sizes[0], return_sequences=True, name="first", **extra)(x)
        second = km.recurrent(kind, sizes[1], return_sequences=True, name="second", **extra)(first)
        return L.Dense(2, name="head")(second)

    return km.functional((None, 3), body, rng, name=f"stack_{kind}", batch_size=2 if stateful else None)


def _keras_reference(model: Any, kind: str, x: Array) -> Array:
    """The stack in float64 from the published equations (reference_equations: ONNX spec form of
    Hochreiter & Schmidhuber 1997 / Gers et al. 2000, Cho et al. 2014, Elman 1990)."""
    h = np.asarray(x, np.float64)
    for name in ("first", "second"):
        layer = model.get_layer(name)
        w = layer.get_weights()
        after = kind == "gru" and bool(layer.reset_after)
        W, R, B = ref.keras_to_onnx(kind, w[0], w[1], w[2], reset_after=after)
        X = h.transpose(1, 0, 2)  # [T, N, I]
        if kind == "lstm":
            Y = ref.onnx_lstm(X, W, R, B)[0]
        elif kind == "gru":
            Y = ref.onnx_gru(X, W, R, B, linear_before_reset=int(after))[0]
        else:
            Y = ref.onnx_rnn(X, W, R, B)[0]
        h = Y[:, 0].transpose(1, 0, 2)  # [T, 1, N, H] → [N, T, H]
    k, b = model.get_layer("head").get_weights()
    return h @ k + b


def _stream_onnx(model: Any, x: Array, chunk: int, output: str) -> Array:
    """Drive the streaming file by hand: ``chunk`` steps per call, each ``*_out`` fed back as its ``*_in``."""
    pairs = json.loads(read_metadata(model)[STREAMING_KEY])["states"]
    sess = km.session(model)
    names = [o.name for o in sess.get_outputs()]
    state: dict[str, Array] = {}
    pieces = []
    for a in range(0, x.shape[1], chunk):
        res = dict(zip(names, sess.run(None, {"x": x[:, a:a + chunk], **state}), strict=True))
        pieces.append(res[output])
        state = {p["input"]: res[p["output"]] for p in pairs}
    return np.concatenate(pieces, axis=1)


def _joined(windows: Array, rows: int) -> Array:
    """Row j = windows j·FACTOR … j·FACTOR+FACTOR−1 side by side along time (written out here)."""
    return np.stack([np.concatenate([windows[j * FACTOR + i] for i in range(FACTOR)], axis=0)
                     for j in range(rows)])


def _keras_check(model: Any, stream: Any, recs: list[Recording]) -> dict[str, Any]:
    from seqgate.runtimes.keras import KerasRunner

    plain = ordinary_view(stream)
    runner = KerasRunner(model, read_probe_map(stream), [o.name for o in plain.graph.output])
    return long_stream_check(stream, recs, input_specs(plain), runner, TOL, FACTOR, 0, 64)


# ----- units, hand-worked ------------------------------------------------------------------------
def test_rows_are_consecutive_windows_and_a_short_recording_is_cycled() -> None:
    # 3 windows of 2 steps, window i filled with i: need 2 rows × 2 windows = 4 → indices 0 1 | 2 0
    x = np.stack([np.full((2, 1), float(i), np.float32) for i in range(3)])
    specs = [s for s in input_specs(_time_model())]
    ls = from_recording(_recording(x), specs, factor=2, rows=2)
    assert ls.feeds["x"][:, :, 0].tolist() == [[0, 0, 1, 1], [2, 2, 0, 0]]
    assert ls.cycled and ls.steps == 4 and ls.window == 2
    assert "repeat cyclically" in ls.how
    full = from_recording(_recording(np.arange(8, dtype=np.float32).reshape(4, 2, 1)), specs, 2, 2)
    assert not full.cycled and full.feeds["x"][:, :, 0].tolist() == [[0, 1, 2, 3], [4, 5, 6, 7]]


def _time_model() -> Any:
    from onnx import TensorProto, helper

    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, ["batch", "time", 1])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, ["batch", "time", 1])
    graph = helper.make_graph([helper.make_node("Identity", ["x"], ["y"])], "g", [x], [y])
    return helper.make_model(graph)


def test_binned_curve_keeps_the_max_of_each_bin() -> None:
    curve = np.zeros(450)
    curve[[0, 4, 449]] = [1.0, 2.0, 3.0]
    curve[6:9] = np.nan  # steps 6..8 (bin 2) compared nowhere
    size, points = binned(curve, 200)  # ceil(450 / 200) = 3 steps per bin → 150 points
    assert size == 3 and len(points) == 150
    assert points[0] == 1.0 and points[1] == 2.0 and points[2] is None and points[-1] == 3.0
    assert sum(p for p in points if p is not None) == 6.0


def test_per_step_rule_is_atol_plus_rtol_times_reference() -> None:
    ref_v = np.array([[[1.0], [10.0]]])  # [N=1, T=2, 1]
    got = ref_v + np.array([[[1.5e-4], [1.5e-4]]])
    d, ok = per_step(got, ref_v, 1, 1e-4, 1e-4)
    # step 0: bound 1e-4 + 1e-4·1 = 2e-4 ≥ 1.5e-4; step 1: bound 1e-4 + 1e-3 — both inside
    assert ok.tolist() == [True, True] and np.allclose(d, 1.5e-4)
    d, ok = per_step(got, ref_v, 1, 1e-4, 0.0)
    assert ok.tolist() == [False, False]
    d, ok = per_step(np.full((1, 2, 1), np.nan), ref_v, 1, 1e-4, 1e-4)
    assert np.isinf(d).all() and not ok.any()  # NaN never passes (IEEE-754: comparisons with NaN are false)


# ----- both frameworks equal the source and the published equations over a long stream ---------
@pytest.mark.parametrize("kind", ["lstm", "gru", "rnn"])
def test_keras_stack_long_stream(kind: str) -> None:
    rng = np.random.default_rng(21)
    model = _keras_stack(kind, rng)
    stream = make_streaming(km.export(model), f"stack {kind}")
    windows = rng.normal(size=(2 * FACTOR, T, 3)).astype(np.float32)
    rep = _keras_check(model, stream, [_recording(windows)])
    assert rep["passed"], rep["first_failure"]
    recorded, synthetic = rep["sets"]
    assert recorded["steps"] == synthetic["steps"] == T * FACTOR and recorded["calls"] == FACTOR
    assert not recorded["cycled"] and recorded["source_run"].startswith("one call on the whole stream")
    per = {t["name"]: t for t in recorded["tensors"]}
    assert per["head"]["steps_compared"] == T * FACTOR
    assert per["second/forward/hidden_sequence"]["steps_compared"] == T * FACTOR
    assert per["first/h_out"]["steps_compared"] == FACTOR  # one state comparison per call
    assert len(recorded["outputs_max_abs"]) == T * FACTOR and recorded["growth"] is not None
    # independent: the file streamed by this test over the same long stream = the equations, whole
    x = _joined(windows, 2)
    km.assert_matches([_stream_onnx(stream, x, T, "head")], [_keras_reference(model, kind, x)], f"long {kind}")


@pytest.mark.parametrize("kind", ["lstm", "gru", "rnn"])
def test_torch_stack_long_stream(kind: str) -> None:
    import torch

    from seqgate.runtimes.torch import TorchRunner

    module = tm.nn().Recurrent(kind, input_size=3, hidden=5, num_layers=2, batch_first=True)
    module = tm.randomize(module, seed=5)
    stream = make_streaming(tm.export(module), f"torch {kind}")
    plain = ordinary_view(stream)
    rng = np.random.default_rng(22)
    windows = rng.normal(size=(7, T, 3)).astype(np.float32)  # fewer than 2 × 10: cycled
    runner = TorchRunner(module, read_probe_map(stream), [o.name for o in plain.graph.output])
    rep = long_stream_check(stream, [_recording(windows)], input_specs(plain), runner, TOL, FACTOR, 0, 64)
    assert rep["passed"], rep["first_failure"]
    assert rep["sets"][0]["cycled"] and rep["sets"][0]["calls"] == FACTOR
    # independent: PyTorch's documented equations over the whole long stream (rows cycle the 7 windows)
    x = _joined(windows[np.arange(2 * FACTOR) % 7], 2)
    params = {k: v.numpy() for k, v in module.rnn.state_dict().items()}
    want = tref.run_module(kind, params, x, num_layers=2, bidirectional=False, batch_first=True)["output"]
    out = plain.graph.output[0].name
    streamed = _stream_onnx(stream, x, T, out)
    assert float(np.abs(streamed - want).max()) < 1e-4  # issue 3 rule's atol (torch_models.ATOL)
    with torch.no_grad():  # and the source itself, whole stream, agrees with the equations
        assert float(np.abs(module(torch.from_numpy(x))[0].numpy() - want).max()) < 1e-4


# ----- a stateful Keras source ------------------------------------------------------------------------
@pytest.fixture(scope="module")
def stateful(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    from seqgate.export.run import export_source

    d = tmp_path_factory.mktemp("stateful")
    rng = np.random.default_rng(23)
    model = _keras_stack("lstm", rng, stateful=True)
    src = km.save(model, d / "stateful.keras")
    onnx_path = d / "stateful.onnx"
    export_source(str(src), onnx_path, force=True)  # stateful → a streaming file by default
    windows = rng.normal(size=(7, T, 3)).astype(np.float32)
    rec = d / "rec.npz"
    np.savez(rec, x=windows)
    return {"model": model, "src": src, "onnx": onnx_path, "rec": rec, "windows": windows}


def test_keras_runner_resets_a_stateful_source(stateful: dict[str, Any]) -> None:
    """run(): every call starts from zeros (windows are independent); run_carrying() after
    reset_states(): Keras carries the state chunk to chunk = the equations over the joined stream."""
    import onnx

    from seqgate.runtimes.keras import KerasRunner

    model, x = stateful["model"], stateful["windows"][:2]
    probes = read_probe_map(onnx.load(str(stateful["onnx"])))
    runner = KerasRunner(model, probes, ["head"])
    assert runner.stateful and runner.fixed_batch == 2
    once, again = runner.run({"x": x})["head"], runner.run({"x": x})["head"]
    km.assert_matches([once, again], [_keras_reference(model, "lstm", x)] * 2, "independent windows")
    three = runner.run({"x": stateful["windows"][:3]})["head"]  # 3 windows: groups of the fixed batch 2
    km.assert_matches([three], [_keras_reference(model, "lstm", stateful["windows"][:3])], "grouped")
    runner.reset_states()
    chunks = [runner.run_carrying({"x": x[:, a:a + 3]})["head"] for a in range(0, T, 3)]
    long_x = np.concatenate([x, x[::-1]], axis=1)
    runner.reset_states()
    carried = [runner.run_carrying({"x": long_x[:, a:a + T]})["head"] for a in (0, T)]
    km.assert_matches([np.concatenate(chunks, 1), np.concatenate(carried, 1)],
                      [_keras_reference(model, "lstm", x), _keras_reference(model, "lstm", long_x)], "carried")


def test_verify_stateful_keras_source(stateful: dict[str, Any]) -> None:
    from seqgate.verify.run import verify_model

    rep = verify_model(stateful["onnx"], str(stateful["src"]), recordings=[stateful["rec"]], batch_size=3)
    assert rep.passed, rep.headline()
    ls = rep.to_json()["long_stream"]
    assert ls["factor"] == FACTOR and ls["rows"] == 2  # the model's fixed batch
    assert [s["label"] for s in ls["sets"]] == [f"long:{stateful['rec']}", "long:synthetic:scaled"]
    assert all(s["source_run"].startswith("stateful source") for s in ls["sets"])
    assert ls["sets"][0]["cycled"]  # 7 windows < 2 rows × 10
    off = verify_model(stateful["onnx"], str(stateful["src"]), recordings=[stateful["rec"]],
                       long_stream_factor=0)
    assert off.passed and off.long_stream is None


# ----- planted bugs ---------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def pair() -> tuple[Any, Any]:
    rng = np.random.default_rng(24)
    model = _keras_stack("lstm", rng, sizes=(4, 4))  # equal sizes: a state output can be rewired
    return model, make_streaming(km.export(model), "pair")


def _windows() -> list[Recording]:
    return [_recording(np.random.default_rng(25).normal(size=(20, T, 3)).astype(np.float32))]


def test_state_not_fed_forward_is_caught_and_named(pair: tuple[Any, Any]) -> None:
    model, stream = pair
    bad = copy.deepcopy(stream)
    lstm = next(n for n in bad.graph.node if n.op_type == "LSTM" and n.name.startswith("second"))
    lstm.input[5] = ""  # second/h_in no longer reaches the layer: h restarts from zeros every call
    rep = _keras_check(model, bad, _windows())
    assert not rep["passed"]
    first = rep["first_failure"]
    assert first["tensor"] == "second/forward/hidden_sequence" and first["step"] == T  # first step of call 2
    assert f"step {T} opens call 2" in first["message"] and "second/h_out → second/h_in" in first["message"]


def test_state_output_rewired_is_caught_and_named(pair: tuple[Any, Any]) -> None:
    model, stream = pair
    bad = copy.deepcopy(stream)
    node = {n.name: n for n in bad.graph.node}
    node["streaming/first/h_out"].input[0] = node["streaming/second/h_out"].input[0]  # second's h instead
    rep = _keras_check(model, bad, _windows())
    assert not rep["passed"]
    first = rep["first_failure"]
    assert first["tensor"] == "first/h_out" and first["step"] == T - 1  # the end of call 1
    assert "does not hold layer first's h" in first["message"]


def test_verify_fails_and_gate_entry_names_the_long_stream_failure(pair: tuple[Any, Any],
                                                                  tmp_path: Path) -> None:
    from seqgate.report.long_stream import long_stream_check_entry, long_stream_html
    from seqgate.verify.run import verify_model

    model, stream = pair
    bad = copy.deepcopy(stream)
    next(n for n in bad.graph.node if n.op_type == "LSTM" and n.name.startswith("first")).input[6] = ""
    path = tmp_path / "bad.onnx"
    path.write_bytes(bad.SerializeToString())
    rec = tmp_path / "rec.npz"
    np.savez(rec, x=np.random.default_rng(26).normal(size=(20, T, 3)).astype(np.float32))
    rep = verify_model(path, str(km.save(model, tmp_path / "pair.keras")), recordings=[rec], chunk=T)
    assert not rep.passed and rep.exit_code == 1
    ls = rep.to_json()["long_stream"]
    assert not ls["passed"] and "first" in ls["first_failure"]["tensor"]
    entry = long_stream_check_entry(ls)
    assert entry["name"] == "long_stream" and not entry["passed"]
    assert ls["first_failure"]["tensor"] in entry["detail"]
    page = long_stream_html(ls)
    assert "<h2>Long stream</h2>" in page and "data:image/png;base64," in page


# ----- names and messages ------------------------------------------------------------------------
@pytest.mark.parametrize("value", ["-1", "1001"])
def test_bad_factor_exits_2_naming_the_option(value: str, tmp_path: Path) -> None:
    from typer.testing import CliRunner

    from seqgate.cli.app import app

    r = CliRunner().invoke(app, ["verify", str(tmp_path / "none.onnx"), "--source", "m.keras", "--synthetic",
                                 "--long-stream-factor", value])
    assert r.exit_code == 2, r.output
    text = " ".join(r.output.split())
    assert f"--long-stream-factor must be in 0..1000, got {value}" in text
    assert "does not exist" not in text  # checked before anything is loaded


def test_headline_names_the_long_stream_failure() -> None:
    from seqgate.verify.run import VerifyReport

    rep = VerifyReport(passed=False, tensors=[], first_divergence=None, recordings=[], model={}, source={},
                       seed=0, settings={}, environment={}, streaming={"passed": True, "runs": []},
                       long_stream={"passed": False, "first_failure": {"message": "long:x: state 's/h_out' …"}})
    assert rep.headline() == "FAILED: long-stream check: long:x: state 's/h_out' …" and rep.exit_code == 1


def test_stateful_stack_of_cells_carries_its_state() -> None:
    """RNN([LSTMCell, GRUCell], stateful=True): the runner's per-cell clones are stateful too, so
    Keras carries both cells' states chunk to chunk (= the equations over the whole stream)."""
    from seqgate.runtimes.keras import KerasRunner

    L = km.keras().layers
    rng = np.random.default_rng(27)
    model = km.functional((None, 3), lambda x: L.RNN([L.LSTMCell(4), L.GRUCell(3)], stateful=True,
                                                     return_sequences=True, name="cells")(x),
                          rng, name="cells", batch_size=2)
    stream = make_streaming(km.export(model), "cells")
    plain = ordinary_view(stream)
    runner = KerasRunner(model, read_probe_map(stream), [o.name for o in plain.graph.output])
    windows = rng.normal(size=(20, T, 3)).astype(np.float32)
    rep = long_stream_check(stream, [_recording(windows)], input_specs(plain), runner, TOL, FACTOR, 0, 64)
    assert rep["passed"], rep["first_failure"]
    assert rep["sets"][0]["source_run"].startswith("stateful source")
    # independent: Keras's stateful chunks against the equations (LSTM, then GRU with reset_after)
    x = _joined(windows, 2)
    lstm, gru = model.get_layer("cells").cell.cells
    W, R, B = ref.keras_to_onnx("lstm", *lstm.get_weights())
    h = ref.onnx_lstm(x.transpose(1, 0, 2), W, R, B)[0][:, 0]
    W, R, B = ref.keras_to_onnx("gru", *gru.get_weights(), reset_after=True)
    want = ref.onnx_gru(h, W, R, B, linear_before_reset=1)[0][:, 0].transpose(1, 0, 2)
    runner.reset_states()
    got = np.concatenate([runner.run_carrying({"x": x[:, a:a + T]})[plain.graph.output[0].name]
                          for a in range(0, x.shape[1], T)], axis=1)
    km.assert_matches([got], [want], "stateful cells")
