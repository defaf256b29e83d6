"""Streaming export: a stream fed chunk by chunk equals the whole window.

References (independent of the code under test): the source framework's whole-window run
(Keras / PyTorch), Keras's own ``stateful=True`` model called twice, the NumPy float64 versions
of the published equations in tests/reference_equations.py (ONNX spec LSTM-14 / GRU-14 / RNN-14)
and tests/torch_reference.py (PyTorch's documented nn.LSTM / nn.GRU / nn.RNN equations).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

import keras_models as km
import reference_equations as ref
import torch_models as tm
import torch_reference as tref
from seqgate.errors import UnsupportedModelError
from seqgate.export.streaming import make_streaming, read_streaming

Array = np.ndarray[Any, Any]
CHUNKS = (1, 7, 5)  # one sample per call, a prime, and another size


def stream(model: Any, feeds: dict[str, Array], chunk: int,
           seq: str) -> tuple[dict[str, list[Array]], dict[str, Array]]:
    """Run ``model`` chunk by chunk along axis 1 of ``feeds[seq]``, feeding the state pairs of the
    metadata forward (the loop a device would run); returns every output per call and the last states."""
    sess = km.session(model)
    info = read_streaming(model)
    assert info is not None
    names = [o.name for o in sess.get_outputs()]
    states: dict[str, Array] = {}
    got: dict[str, list[Array]] = {n: [] for n in names}
    steps = feeds[seq].shape[1]
    for a in range(0, steps, chunk):
        part = {k: (v[:, a:a + chunk] if k == seq else v) for k, v in feeds.items()}
        res = dict(zip(names, sess.run(None, {**part, **states}), strict=True))
        for n in names:
            got[n].append(res[n])
        states = {s["input"]: res[s["output"]] for s in info["states"]}
    return got, {s["output"]: got[s["output"]][-1] for s in info["states"]}


def _keras_stack(rng: np.random.Generator) -> Any:
    k = km.keras()
    L = k.layers

    def body(x: Any) -> Any:
        y = L.LSTM(6, return_sequences=True, name="lstm")(x)
        y = L.GRU(5, return_sequences=True, name="gru")(y)
        y = L.SimpleRNN(4, return_sequences=True, name="rnn")(y)
        return L.Dense(2, name="head")(y)

    return km.functional((None, 3), body, rng, name="stack")


def _numpy_keras_stack(model: Any, x: Array) -> tuple[Array, dict[str, Array]]:
    """The stack in float64 from the ONNX spec equations (reference_equations), Keras weights
    converted by naming each gate block (reference_equations.keras_to_onnx)."""
    h = np.asarray(x, np.float64).transpose(1, 0, 2)  # [T, N, I]
    finals = {}
    for name, kind in (("lstm", "lstm"), ("gru", "gru"), ("rnn", "rnn")):
        cell = model.get_layer(name).cell
        reset_after = bool(getattr(cell, "reset_after", False))
        W, R, B = ref.keras_to_onnx(kind, cell.kernel.numpy(), cell.recurrent_kernel.numpy(), cell.bias.numpy(),
                                    reset_after)
        if kind == "lstm":
            Y, yh, yc = ref.onnx_lstm(h, W, R, B)
            finals["lstm/c_out"] = yc
        elif kind == "gru":
            Y, yh = ref.onnx_gru(h, W, R, B, linear_before_reset=int(reset_after))
        else:
            Y, yh = ref.onnx_rnn(h, W, R, B)
        finals[f"{name}/h_out"] = yh
        h = Y[:, 0]
    head = model.get_layer("head")
    out = h.transpose(1, 0, 2) @ head.kernel.numpy() + head.bias.numpy()
    return out, finals


@pytest.mark.parametrize("chunk", CHUNKS)
def test_keras_stack_chunked_equals_whole(chunk: int, rng: np.random.Generator) -> None:
    model = _keras_stack(rng)
    sm = make_streaming(km.export(model), "stack")
    x = rng.normal(size=(2, 19, 3)).astype(np.float32)
    got, states = stream(sm, {"x": x}, chunk, "x")
    streamed = np.concatenate(got["head"], axis=1)
    km.assert_matches([streamed], km.keras_outputs(model, [x]), f"chunk {chunk} vs Keras")  # source framework
    want, finals = _numpy_keras_stack(model, x)
    km.assert_matches([streamed], [want], f"chunk {chunk} vs ONNX spec equations")  # reference_equations
    for name, value in finals.items():
        km.assert_matches([states[name]], [value], f"{name} vs ONNX spec equations")


def test_state_inputs_are_optional(rng: np.random.Generator) -> None:
    """Left out, None or zeros: the same first call (ONNX optional inputs, onnxruntime 1.32)."""
    sm = make_streaming(km.export(_keras_stack(rng)), "stack")
    sess = km.session(sm)
    x = rng.normal(size=(3, 4, 3)).astype(np.float32)
    info = read_streaming(sm)
    assert info is not None
    absent = sess.run(None, {"x": x})
    none = sess.run(None, {"x": x, **{s["input"]: None for s in info["states"]}})
    zeros = sess.run(None, {"x": x, **{s["input"]: np.zeros((1, 3, s["shape"][2]), np.float32)
                                       for s in info["states"]}})
    for a, b, c in zip(absent, none, zeros, strict=True):
        assert np.array_equal(a, b) and np.array_equal(a, c)
    assert [(s["layer"], s["state"]) for s in info["states"]] == [
        ("lstm", "h"), ("lstm", "c"), ("gru", "h"), ("rnn", "h")]
    assert info["outputs"] == [{"name": "head", "time_axis": 1}]


def _torch_stack(kind: str) -> Any:
    nn = tm.nn()
    return tm.randomize(nn.Recurrent(kind, input_size=3, hidden=5, num_layers=2, batch_first=True), seed=4)


@pytest.mark.parametrize("kind", ["lstm", "gru", "rnn"])
@pytest.mark.parametrize("chunk", CHUNKS)
def test_torch_stack_chunked_equals_whole(kind: str, chunk: int, rng: np.random.Generator) -> None:
    import torch

    module = _torch_stack(kind)
    sm = make_streaming(tm.export(module), "torch stack")
    x = rng.normal(size=(2, 15, 3)).astype(np.float32)
    got, states = stream(sm, {"x": x}, chunk, "x")
    first = next(o.name for o in sm.graph.output)
    streamed = np.concatenate(got[first], axis=1)
    with torch.no_grad():
        want = module(torch.from_numpy(x))[0].numpy()
    km.assert_matches([streamed], [want], f"{kind} chunk {chunk} vs PyTorch")  # source framework
    params = {k: v.detach().numpy() for k, v in module.rnn.state_dict().items()}
    np_ref = tref.run_module(kind, params, x, 2, False, True)  # PyTorch's documented equations
    km.assert_matches([streamed], [np_ref["output"]], f"{kind} chunk {chunk} vs NumPy equations")
    info = read_streaming(sm)
    assert info is not None
    h_pairs = [s for s in info["states"] if s["state"] == "h"]
    assert len(h_pairs) == 2
    for layer, s in enumerate(h_pairs):
        km.assert_matches([states[s["output"]][0]], [np_ref["h_n"][layer]], f"{s['output']} vs NumPy")
        if kind == "lstm":
            c = next(p for p in info["states"] if p["layer"] == s["layer"] and p["state"] == "c")
            km.assert_matches([states[c["output"]][0]], [np_ref["c_n"][layer]], f"{c['output']} vs NumPy")


def _stateful(kind: str, rng: np.random.Generator) -> Any:
    return km.functional((None, 3), lambda x: km.recurrent(kind, 4, stateful=True, return_sequences=True,
                                                           name=f"stateful_{kind}")(x),
                         rng, name=f"stateful_{kind}", batch_size=2)


@pytest.mark.parametrize("kind", ["lstm", "gru", "rnn"])
def test_keras_stateful_called_twice(kind: str, rng: np.random.Generator, tmp_path: Any) -> None:
    """Keras's own stateful model called twice (state carried by Keras) against the streaming
    export called twice with the state fed forward."""
    from seqgate.export.run import export_source

    model = _stateful(kind, rng)
    path = km.save(model, tmp_path / f"{kind}.keras")
    res = export_source(str(path), tmp_path / f"{kind}.onnx")  # stateful: streaming by default
    info = read_streaming(res.model)
    assert info is not None and info["states"][0]["shape"] == [1, 2, 4]
    x1 = rng.normal(size=(2, 6, 3)).astype(np.float32)
    x2 = rng.normal(size=(2, 9, 3)).astype(np.float32)
    keras_first = km.keras_outputs(model, [x1])[0]
    keras_second = km.keras_outputs(model, [x2])[0]  # Keras carries the state: stateful=True
    sess = km.session(res.model)
    names = [o.name for o in sess.get_outputs()]
    first = dict(zip(names, sess.run(None, {"x": x1}), strict=True))
    states = {s["input"]: first[s["output"]] for s in info["states"]}
    second = dict(zip(names, sess.run(None, {"x": x2, **states}), strict=True))
    out = names[0]
    km.assert_matches([first[out], second[out]], [keras_first, keras_second], f"stateful {kind}")
    fresh = sess.run(None, {"x": x2})[0]  # without the state the second call must differ
    assert np.abs(fresh - keras_second).max() > 1e-3


def test_keras_stateful_stack_of_cells_streams_by_default(rng: np.random.Generator, tmp_path: Any) -> None:
    """``RNN([LSTMCell, GRUCell], stateful=True)`` is a streaming file without ``--streaming``; two
    calls with the state fed forward equal Keras's own stateful layer called twice."""
    from seqgate.export.run import export_source

    k = km.keras()
    layer = k.layers.RNN([k.layers.LSTMCell(4), k.layers.GRUCell(3)], stateful=True, return_sequences=True,
                         name="cells")
    model = km.functional((None, 3), lambda x: layer(x), rng, name="stateful_cells", batch_size=2)
    res = export_source(str(km.save(model, tmp_path / "cells.keras")), tmp_path / "cells.onnx")
    info = read_streaming(res.model)
    assert info is not None and len(info["states"]) == 3  # h and c of the LSTM cell, h of the GRU cell
    x1, x2 = (rng.normal(size=(2, t, 3)).astype(np.float32) for t in (5, 8))
    expected = [km.keras_outputs(model, [x])[0] for x in (x1, x2)]  # Keras carries the state
    sess = km.session(res.model)
    names = [o.name for o in sess.get_outputs()]
    first = dict(zip(names, sess.run(None, {"x": x1}), strict=True))
    states = {s["input"]: first[s["output"]] for s in info["states"]}
    second = sess.run(None, {"x": x2, **states})[0]
    km.assert_matches([first[names[0]], second], expected, "stateful stack of cells")




def test_keras_stateful_scan_cell_refused_by_default_with_the_way_out(rng: np.random.Generator,
                                                                       tmp_path: Any) -> None:
    """A stateful custom cell that exports as a Scan cannot stream yet: refused (exit 3) saying that
    stateful=True made streaming the default and that --no-streaming writes an ordinary file."""
    from seqgate.export.run import export_source
    from seqgate.sources.keras import load_custom_code

    code = tmp_path / "leak_cells.py"
    code.write_text(km.leaky_tanh_cell_source("HalfLeakCell", "seqgate_streaming_test"), encoding="utf-8")
    cell = load_custom_code(code).HalfLeakCell(3)
    k = km.keras()
    model = km.functional((None, 2), lambda x: k.layers.RNN(cell, stateful=True, return_sequences=True,
                                                            name="leak")(x), rng, batch_size=2)
    path = km.save(model, tmp_path / "leak.keras")
    with pytest.raises(UnsupportedModelError) as e:
        export_source(str(path), tmp_path / "leak.onnx", custom_code=code)
    assert "stateful=True" in str(e.value) and "--no-streaming" in str(e.value) and "leak" in str(e.value)
    res = export_source(str(path), tmp_path / "leak.onnx", custom_code=code, streaming=False)
    assert read_streaming(res.model) is None


def test_keras_bidirectional_stateful_refused(rng: np.random.Generator) -> None:
    k = km.keras()
    bi = k.layers.Bidirectional(k.layers.LSTM(4, stateful=True), name="bi")
    model = km.functional((None, 3), lambda x: bi(x), rng, batch_size=2)
    with pytest.raises(UnsupportedModelError) as e:
        km.export(model)
    assert "bi (Bidirectional)" in str(e.value)
    assert "backward direction starts from the window's last step" in str(e.value)


def _refused_models() -> list[tuple[str, Any, str]]:
    k = km.keras()
    L = k.layers
    return [
        ("pooled", lambda x: L.GlobalAveragePooling1D(name="pool")(L.LSTM(4, return_sequences=True)(x)),
         "pool (GlobalAveragePooling1D)"),
        ("backwards", lambda x: L.GRU(4, go_backwards=True, name="back")(x), "back (GRU)"),
        ("bidirectional", lambda x: L.Bidirectional(L.LSTM(4), name="bi")(x), "bi (Bidirectional)"),
        ("masked", lambda x: L.LSTM(4, name="masked_lstm")(L.Masking(0.0)(x)), "masked_lstm"),
        ("conv", lambda x: L.LSTM(4, name="l")(L.Conv1D(3, 3, padding="causal", name="conv")(x)),
         "conv (Conv1D)"),
        ("attention", lambda x: L.Multiply(name="mix")([L.LSTM(4, return_sequences=True)(x),
                                                         L.Reshape((1, 4))(L.LSTM(4)(x))]), "mix (Multiply)"),
    ]


@pytest.mark.parametrize("case", range(6))
def test_non_causal_layers_refused_for_streaming_only(case: int, rng: np.random.Generator) -> None:
    name, body, needle = _refused_models()[case]
    model = km.functional((None, 3), body, rng, name=name)
    ordinary = km.export(model)  # the ordinary export still works
    assert not any(i.type.HasField("optional_type") for i in ordinary.graph.input)
    with pytest.raises(UnsupportedModelError) as e:
        make_streaming(ordinary, name)
    assert needle in str(e.value), str(e.value)
    assert "for streaming" in str(e.value)


def test_summary_output_is_marked_latest(rng: np.random.Generator) -> None:
    """An output without a time axis (last h → Dense) is the prefix's output after every call:
    compared with Keras run on each prefix (source framework)."""
    k = km.keras()
    model = km.functional((None, 3), lambda x: k.layers.Dense(2, name="head")(k.layers.LSTM(4)(x)), rng)
    sm = make_streaming(km.export(model), "last")
    info = read_streaming(sm)
    assert info is not None and info["outputs"] == [{"name": "head", "time_axis": None}]
    x = rng.normal(size=(2, 10, 3)).astype(np.float32)
    got, _ = stream(sm, {"x": x}, 3, "x")
    for i, value in enumerate(got["head"]):
        end = min(3 * (i + 1), 10)
        km.assert_matches([value], km.keras_outputs(model, [x[:, :end]]), f"prefix {end}")


def test_torch_time_major_refused_for_streaming_saying_why() -> None:
    """nn.LSTM(batch_first=False) on a [time, batch, features] input: the ordinary export works;
    streaming (which cuts along axis 1) is refused naming the time-major layout and the fix."""
    nn = tm.nn()
    module = tm.randomize(nn.Recurrent("lstm", input_size=3, hidden=5, num_layers=2, batch_first=False), seed=4)
    ordinary = tm.export(module, ["x:time,batch,3"])
    with pytest.raises(UnsupportedModelError, match=r"time-major input.*batch_first=True"):
        make_streaming(ordinary, "time-major")
