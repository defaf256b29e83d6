"""Keras ``RNN([cell, cell])`` stacks: one native node per cell, checked against Keras and NumPy.

References: Keras itself (the source framework) and the ONNX LSTM/GRU/RNN spec equations in
NumPy float64 (``reference_equations``: Hochreiter & Schmidhuber 1997 with the forget gate,
Cho et al. 2014, Elman 1990), with the Keras weights laid out by ``keras_to_onnx`` (written
from Keras's gate order, not from seqgate's tables).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

import keras_models as km
from reference_equations import keras_to_onnx, onnx_gru, onnx_lstm, onnx_rnn

pytestmark = pytest.mark.filterwarnings("ignore:__array__ implementation:DeprecationWarning")


def _keras_flat(model: Any, feeds: list[np.ndarray]) -> list[np.ndarray]:
    """Keras's outputs flattened (a stack returns the LSTM cell's states as a nested [h, c])."""
    out = model(feeds if len(feeds) > 1 else feeds[0], training=False)
    return [np.asarray(o) for o in km.keras().tree.flatten(out)]


def _stack_model(rng: np.random.Generator, seqs: bool, state: bool, back: bool, init: bool = False) -> Any:
    k = km.keras()
    cells = [k.layers.LSTMCell(4), k.layers.GRUCell(3, reset_after=False), k.layers.SimpleRNNCell(5)]

    def body(x: Any, *states: Any) -> Any:
        layer = k.layers.RNN(cells, return_sequences=seqs, return_state=state, go_backwards=back, name="stack")
        if not states:
            return layer(x)
        return layer(x, initial_state=[[states[0], states[1]], states[2], states[3]])

    shapes = [(None, 3), (4,), (4,), (3,), (5,)] if init else (None, 3)
    return km.functional(shapes, body, rng)


@pytest.mark.parametrize(("seqs", "state", "back"), [(True, True, False), (False, False, True),
                                                      (True, False, True), (False, True, False)])
def test_stack_of_cells_matches_keras(seqs: bool, state: bool, back: bool, rng: np.random.Generator) -> None:
    model = _stack_model(rng, seqs, state, back)
    onnx_model = km.export(model)
    assert [n.op_type for n in onnx_model.graph.node if n.op_type in ("LSTM", "GRU", "RNN", "Scan")] == \
        ["LSTM", "GRU", "RNN"]
    for batch, time in ((1, 5), (3, 9)):
        feeds = km.inputs_for(model, rng, batch, time)
        km.assert_matches(km.onnx_outputs(onnx_model, feeds), _keras_flat(model, feeds),
                          f"stack seqs={seqs} state={state} back={back}")


def test_stack_with_initial_states_matches_keras(rng: np.random.Generator) -> None:
    model = _stack_model(rng, True, True, False, init=True)
    feeds = km.inputs_for(model, rng, 2, 6)
    km.assert_matches(km.onnx_outputs(km.export(model), feeds), _keras_flat(model, feeds), "stack init")


def test_stack_matches_the_published_equations(rng: np.random.Generator) -> None:
    """NumPy: ONNX spec LSTM (Hochreiter & Schmidhuber 1997 + forget gate) → GRU (Cho et al. 2014,
    reset before the matmul = linear_before_reset 0) → Elman RNN, each reading the one below."""
    model = _stack_model(rng, True, True, False)
    c0, c1, c2 = model.get_layer("stack").cell.cells
    x = km.inputs_for(model, rng, 2, 7)[0]
    y0, _, cf0 = onnx_lstm(x.transpose(1, 0, 2), *keras_to_onnx(
        "lstm", c0.kernel.numpy(), c0.recurrent_kernel.numpy(), c0.bias.numpy()))
    y1, _ = onnx_gru(y0[:, 0], *keras_to_onnx("gru", c1.kernel.numpy(), c1.recurrent_kernel.numpy(),
                                                c1.bias.numpy()), linear_before_reset=0)
    y2, h2 = onnx_rnn(y1[:, 0], *keras_to_onnx("rnn", c2.kernel.numpy(), c2.recurrent_kernel.numpy(),
                                                 c2.bias.numpy()))
    got = km.onnx_outputs(km.export(model), [x])
    km.assert_matches([got[0], got[2], got[4]], [y2[:, 0].transpose(1, 0, 2), cf0[0], h2[0]], "stack vs NumPy")


def test_stack_probes_per_cell_match_single_cell_layers(rng: np.random.Generator) -> None:
    """Every cell's probes; reference: Keras RNN(cell_k) run alone over cell k−1's Keras output."""
    from seqgate.onnxfile.probes import read_probe_map, to_canonical, with_probe_outputs

    k = km.keras()
    model = _stack_model(rng, False, False, True)
    onnx_model = km.export(model)
    probes = read_probe_map(onnx_model)
    names = {p.name for p in probes}
    assert {f"stack/cell{i}/reverse/hidden_sequence" for i in range(3)} <= names
    assert "stack/cell0/reverse/cell_final" in names
    x = km.inputs_for(model, rng, 2, 6)[0]
    seq = x
    expected = {}
    for i, cell in enumerate(model.get_layer("stack").cell.cells):
        alone = k.layers.RNN(type(cell).from_config(cell.get_config()), return_sequences=True,
                             return_state=True, go_backwards=i == 0)
        alone.build((None, None, seq.shape[-1]))
        alone.set_weights(cell.get_weights())
        res = [np.asarray(v) for v in alone(seq)]
        seq = res[0]
        expected[f"stack/cell{i}/reverse/hidden_sequence"] = res[0][:, ::-1, None, :]
        expected[f"stack/cell{i}/reverse/hidden_final"] = res[1][:, None, :]
        if len(res) == 3:
            expected[f"stack/cell{i}/reverse/cell_final"] = res[2][:, None, :]
    full = with_probe_outputs(onnx_model, probes)
    values = km.onnx_outputs(full, [x], [p.value for p in probes])
    assert set(expected) == names
    for p, v in zip(probes, values, strict=True):
        km.assert_matches([to_canonical(p, v)], [expected[p.name]], p.name)


@pytest.mark.parametrize("back", [False, True])
def test_cli_export_and_verify_a_stack_with_per_cell_probes(back: bool, tmp_path: Any,
                                                           rng: np.random.Generator) -> None:
    """verify compares every cell's probes with the Keras runner's per-cell re-execution."""
    from typer.testing import CliRunner

    from seqgate.cli.app import app
    from seqgate.verify.run import verify_model

    path = km.save(_stack_model(rng, True, False, back), tmp_path / "stack.keras")
    out = tmp_path / "stack.onnx"
    r = CliRunner().invoke(app, ["export", str(path), "-o", str(out)])
    assert r.exit_code == 0, r.output
    rep = verify_model(out, str(path), synthetic=True)
    names = {t["name"] for t in rep.tensors}
    assert {f"stack/cell{i}/{'reverse' if back else 'forward'}/hidden_sequence" for i in range(3)} <= names
    assert rep.exit_code == 0, rep.headline()
