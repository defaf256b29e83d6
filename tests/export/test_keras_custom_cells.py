"""Keras custom cells: opt-in loading, symbolic tracing, native recognition or an exact Scan.

References: Keras itself running the model (the source framework); NumPy float64 readings of the
ONNX LSTM/GRU/RNN spec equations in ``reference_equations`` (peephole LSTM: Gers & Schmidhuber
2000 and the spec's ``P = [Pi, Po, Pf]``; GRU: Cho et al. 2014 with ``linear_before_reset = 1``;
Elman RNN with the identity as ONNX ``Affine(1, 0)``), fed the cell's own weights laid out by
``keras_to_onnx`` (written from Keras's gate order, not seqgate's tables); and ``onnx.reference``
where FACTS.md says it supports the attributes (default activations, peepholes,
``linear_before_reset``).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
from onnx.reference import ReferenceEvaluator
from typer.testing import CliRunner

import keras_models as km
from reference_equations import keras_to_onnx, onnx_gru, onnx_lstm, onnx_rnn

pytestmark = pytest.mark.filterwarnings("ignore:__array__ implementation:DeprecationWarning")
CELLS_FILE = Path(__file__).resolve().parents[1] / "keras_custom_cells.py"
NATIVE = ("LSTM", "GRU", "RNN")


@pytest.fixture(scope="module")
def cells() -> Any:
    from seqgate.sources.keras import load_custom_code

    return load_custom_code(CELLS_FILE)


def _model(cell: Any, rng: np.random.Generator, **opts: Any) -> Any:
    k = km.keras()
    return km.functional((None, 3), lambda x: k.layers.RNN(cell, name="rnn", **opts)(x), rng)


def _ops(model: Any) -> list[str]:
    return [n.op_type for n in model.graph.node]


def _check(model: Any, rng: np.random.Generator) -> tuple[Any, np.ndarray, list[np.ndarray]]:
    onnx_model = km.export(model)
    for batch, time in ((1, 4), (3, 9)):
        feeds = km.inputs_for(model, rng, batch, time)
        got = km.onnx_outputs(onnx_model, feeds)
        ref = [np.asarray(v) for v in km.keras().tree.flatten(model(feeds[0], training=False))]
        km.assert_matches(got, ref, model.name)  # reference: Keras running the model
    return onnx_model, feeds[0], got


def test_peephole_cell_is_one_native_lstm_with_p(cells: Any, rng: np.random.Generator) -> None:
    model = _model(cells.PeepholeLSTMCell(4), rng, return_sequences=True)
    onnx_model, x, got = _check(model, rng)
    assert _ops(onnx_model).count("LSTM") == 1 and "Scan" not in _ops(onnx_model)
    cell = model.get_layer("rnn").cell
    w, r, b = keras_to_onnx("lstm", cell.kernel.numpy(), cell.recurrent_kernel.numpy(), cell.bias.numpy())
    p = np.concatenate([cell.p_i.numpy(), cell.p_o.numpy(), cell.p_f.numpy()])[None]  # spec order i, o, f
    y, _, _ = onnx_lstm(x.transpose(1, 0, 2), w, r, b, P=p)  # Gers & Schmidhuber 2000 / ONNX LSTM spec
    km.assert_matches(got, [y[:, 0].transpose(1, 0, 2)], "peephole vs NumPy")
    ref = ReferenceEvaluator(onnx_model).run(None, {"x": x})
    km.assert_matches(ref, got, "onnx.reference", atol=1e-5, rtol=1e-5)


def test_minimal_rnn_cell_is_one_native_rnn(cells: Any, rng: np.random.Generator) -> None:
    model = _model(cells.MinimalRNNCell(5), rng, return_sequences=True, go_backwards=True)
    onnx_model, x, got = _check(model, rng)
    assert _ops(onnx_model).count("RNN") == 1 and "Scan" not in _ops(onnx_model)
    cell = model.get_layer("rnn").cell
    w, r, _ = keras_to_onnx("rnn", cell.kernel.numpy(), cell.recurrent_kernel.numpy(), None)
    y, _ = onnx_rnn(x.transpose(1, 0, 2), w, r, direction="reverse", activations=[("Affine", 1.0, 0.0)])
    # go_backwards returns the sequence in processing order: Y (input order) flipped in time
    km.assert_matches(got, [y[::-1, 0].transpose(1, 0, 2)], "minimal RNN vs NumPy")


def test_dense_gru_cell_is_one_native_gru(cells: Any, rng: np.random.Generator) -> None:
    model = _model(cells.DenseGRUCell(4), rng, return_state=True)
    onnx_model, x, got = _check(model, rng)
    (node,) = [n for n in onnx_model.graph.node if n.op_type in NATIVE]
    assert node.op_type == "GRU" and "Scan" not in _ops(onnx_model)
    assert {a.name: a.i for a in node.attribute}["linear_before_reset"] == 1
    cell = model.get_layer("rnn").cell
    w, r, _ = keras_to_onnx("gru", cell.wx.kernel.numpy(), cell.uh.kernel.numpy(), None)
    b = np.concatenate([cell.wx.bias.numpy(), cell.uh.bias.numpy()])[None]  # [Wb; Rb], gates z, r, h
    _, y_h = onnx_gru(x.transpose(1, 0, 2), w, r, b, linear_before_reset=1)  # Cho et al. 2014 / spec
    km.assert_matches(got, [y_h[0], y_h[0]], "GRU vs NumPy")
    ref = ReferenceEvaluator(onnx_model).run(None, {"x": x})
    km.assert_matches(ref, got, "onnx.reference", atol=1e-5, rtol=1e-5)


@pytest.mark.parametrize("opts", [{"return_sequences": True}, {"go_backwards": True, "return_state": True}])
def test_near_miss_and_other_cells_are_an_exact_scan(cells: Any, opts: dict[str, Any],
                                                     rng: np.random.Generator) -> None:
    for cell in (cells.OldCellPeepholeLSTMCell(4), cells.LayerNormTanhCell(3)):
        onnx_model, _, _ = _check(_model(cell, rng, **opts), rng)
        assert "Scan" in _ops(onnx_model) and not set(_ops(onnx_model)) & set(NATIVE)


def test_untraceable_cell_is_refused_naming_the_cell_and_op(cells: Any, rng: np.random.Generator) -> None:
    from seqgate.errors import UnsupportedModelError

    with pytest.raises(UnsupportedModelError, match=r"SortingCell.*Sort"):
        km.export(_model(cells.SortingCell(3), rng))


def test_safe_loading_refuses_custom_cells_until_the_file_is_named(cells: Any, tmp_path: Path,
                                                                   rng: np.random.Generator) -> None:
    from seqgate.cli.app import app

    k = km.keras()
    model = _model(cells.PeepholeLSTMCell(4), rng, return_sequences=True)
    path = km.save(model, tmp_path / "peep.keras")
    out = tmp_path / "peep.onnx"
    registry = k.saving.get_custom_objects()
    ours = {n: c for n, c in registry.items() if n.startswith(cells.PACKAGE)}
    for n in ours:
        del registry[n]  # as in a fresh process that never imported the cells' file
    try:
        r = CliRunner().invoke(app, ["export", str(path), "-o", str(out)])
    finally:
        registry.update(ours)
    assert r.exit_code == 2, r.output
    assert "PeepholeLSTMCell" in r.output and "--custom-code" in r.output
    assert not out.exists()
    r = CliRunner().invoke(app, ["export", str(path), "-o", str(out), "--custom-code", str(CELLS_FILE)])
    assert r.exit_code == 0, r.output
    r = CliRunner().invoke(app, ["verify", str(out), "--source", str(path), "--custom-code", str(CELLS_FILE),
                                 "--synthetic", "--quiet"])
    assert r.exit_code == 0, r.output


def test_verify_compares_scan_probes_with_keras(cells: Any, tmp_path: Path, rng: np.random.Generator) -> None:
    from seqgate.export.run import export_source
    from seqgate.verify.run import verify_model

    path = km.save(_model(cells.LayerNormTanhCell(3), rng, return_sequences=True, go_backwards=True),
                   tmp_path / "ln.keras")
    res = export_source(str(path), tmp_path / "ln.onnx")
    assert "Scan" in _ops(res.model)
    rep = verify_model(res.path, str(path), synthetic=True)
    names = {t["name"] for t in rep.tensors}
    assert {"rnn/reverse/hidden_sequence", "rnn/reverse/hidden_final"} <= names
    assert rep.exit_code == 0, rep.headline()


def test_bad_custom_code_file_is_exit_2(tmp_path: Path) -> None:
    from seqgate.cli.app import app

    bad = tmp_path / "broken_cells.py"
    bad.write_text("raise RuntimeError('half-written file')\n", encoding="utf-8")
    out = str(tmp_path / "m.onnx")
    r = CliRunner().invoke(app, ["export", "m.keras", "-o", out, "--custom-code", str(bad)])
    assert r.exit_code == 2 and "broken_cells.py" in r.output and "RuntimeError" in r.output
