"""Masks on Keras ``RNN([cells])`` stacks and on custom cells, for every mask pattern.

Three independent computations agree: Keras itself running the model; a NumPy float64 loop of
the published cell equations with the Keras mask rule (``masked_reference.keras_masked_loop``,
written from the Keras masking guide and the ``RNN`` docstring; cell steps from the ONNX-spec
oracles of ``reference_equations`` — LSTM with peepholes: Gers & Schmidhuber 2000; GRU: Cho et
al. 2014; Elman RNN — or, for cells with no ONNX operator, their equations written out below);
and the exported graph in onnxruntime. Tolerance ``keras_models.ATOL/RTOL`` (float32 against
float64; FACTS.md measured ~2e-7 at these sizes).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest

import keras_models as km
from masked_reference import (
    Step,
    builtin_cell_step,
    keras_masked_loop,
    mask_patterns,
    stacked_step,
)
from reference_equations import keras_to_onnx, onnx_gru, onnx_lstm, sigmoid

pytestmark = pytest.mark.filterwarnings("ignore:__array__ implementation:DeprecationWarning")
CELLS_FILE = Path(__file__).resolve().parents[1] / "keras_custom_cells.py"
F = 3
Array = np.ndarray[Any, Any]


@pytest.fixture(scope="module")
def cells() -> Any:
    from seqgate.sources.keras import load_custom_code

    return load_custom_code(CELLS_FILE)


def _masked_input(rng: np.random.Generator, mask: Array) -> Array:
    """Features away from 0 at valid steps, all 0.0 (the Masking value) at masked steps."""
    x = rng.normal(size=(*mask.shape, F)) + np.sign(rng.normal(size=(*mask.shape, F))) * 0.1
    return np.where(mask[..., None], x, 0.0).astype(np.float32)


def _flat_keras(model: Any, feeds: list[Array]) -> list[Array]:
    out = model(feeds if len(feeds) > 1 else feeds[0], training=False)
    return [np.asarray(v) for v in km.keras().tree.flatten(out)]


def _ops(onnx_model: Any) -> set[str]:
    return {n.op_type for n in onnx_model.graph.node}


# ----- stacks of built-in cells ---------------------------------------------------------------

def _stack_cells(reset_after: bool) -> list[Any]:
    k = km.keras()
    return [k.layers.LSTMCell(3), k.layers.GRUCell(4, reset_after=reset_after), k.layers.SimpleRNNCell(2)]


def _stack_step(layer: Any) -> tuple[Step, list[int]]:
    steps, sizes = [], []
    for cell in layer.cell.cells:
        kind = {"LSTMCell": "lstm", "GRUCell": "gru", "SimpleRNNCell": "rnn"}[type(cell).__name__]
        weights = [np.asarray(w) for w in cell.get_weights()]
        steps.append((builtin_cell_step(kind, weights, bool(getattr(cell, "reset_after", False))),
                      2 if kind == "lstm" else 1))
        sizes += [int(cell.units)] * (2 if kind == "lstm" else 1)
    return stacked_step(steps), sizes


@pytest.mark.parametrize("back", [False, True])
@pytest.mark.parametrize("zero", [False, True])
def test_masked_stack_matches_keras_and_equations(back: bool, zero: bool, rng: np.random.Generator) -> None:
    k = km.keras()
    opts = {"go_backwards": back, "zero_output_for_mask": zero}

    def body(x: Any) -> list[Any]:
        m = k.layers.Masking(0.0)(x)
        seq = k.layers.RNN(_stack_cells(back), return_sequences=True, return_state=True, name="seq", **opts)(m)
        last = k.layers.RNN(_stack_cells(not back), name="last", **opts)(m)
        return [*k.tree.flatten(seq), last]

    model = km.functional((None, F), body, rng, name="masked_stack")
    onnx_model = km.export(model)
    assert "Scan" not in _ops(onnx_model)
    for pattern, mask in mask_patterns(rng, 4, 8).items():
        x = _masked_input(rng, mask)
        got = km.onnx_outputs(onnx_model, [x])
        km.assert_matches(got, _flat_keras(model, [x]), f"stack vs Keras {pattern} {opts}")
        # Keras StackedRNNCells under the Keras mask rule, one step at a time (masked_reference)
        step, sizes = _stack_step(model.get_layer("seq"))
        seq, _, states = keras_masked_loop(step, x, mask, [np.zeros((4, s)) for s in sizes], back, zero)
        km.assert_matches(got[:1 + len(states)], [seq, *states], f"stack vs equations {pattern}")
        step, sizes = _stack_step(model.get_layer("last"))
        _, last, _ = keras_masked_loop(step, x, mask, [np.zeros((4, s)) for s in sizes], back, zero)
        km.assert_matches([got[-1]], [last], f"stack last output vs equations {pattern}")


def test_masked_stack_keeps_initial_states_of_rows_without_valid_steps(rng: np.random.Generator) -> None:
    """Keras does not pass the mask on when initial_state tensors are given (FACTS.md): pass it."""
    k = km.keras()
    x_in = k.Input((None, F), name="x")
    inits = [k.Input((s,), name=f"s{i}") for i, s in enumerate((2, 2, 3))]
    masked = k.layers.Masking(0.0)(x_in)
    outs = k.layers.RNN([k.layers.LSTMCell(2), k.layers.GRUCell(3)], return_sequences=True, return_state=True,
                        name="seq")(masked, initial_state=[inits[:2], inits[2]], mask=masked._keras_mask)
    model = km.randomize(k.Model([x_in, *inits], k.tree.flatten(outs)), rng)
    mask = mask_patterns(rng, 4, 7)["holes"]  # row 1 has no valid step
    feeds = [_masked_input(rng, mask), *(rng.normal(size=(4, s)).astype(np.float32) for s in (2, 2, 3))]
    got = km.onnx_outputs(km.export(model), feeds)
    km.assert_matches(got, _flat_keras(model, feeds), "stack initial state vs Keras")
    step, _ = _stack_step(model.get_layer("seq"))
    seq, _, states = keras_masked_loop(step, feeds[0], mask, feeds[1:])
    km.assert_matches(got, [seq, *states], "stack initial state vs equations")
    for g, s0 in zip(got[1:], feeds[1:], strict=True):
        np.testing.assert_array_equal(g[1], s0[1])  # carried unchanged: no step of row 1 is valid


# ----- custom cells ---------------------------------------------------------------------------

def _peephole_step(cell: Any) -> Step:
    """Gers & Schmidhuber 2000 through the ONNX LSTM oracle, ``P = [p_i, p_o, p_f]`` (spec order)."""
    w, r, b = keras_to_onnx("lstm", cell.kernel.numpy(), cell.recurrent_kernel.numpy(), cell.bias.numpy())
    p = np.concatenate([cell.p_i.numpy(), cell.p_o.numpy(), cell.p_f.numpy()])[None]

    def step(x: Array, s: list[Array]) -> tuple[Array, list[Array]]:
        _, h, c = onnx_lstm(x[None], w, r, b, P=p, initial_h=s[0][None], initial_c=s[1][None])
        return h[0], [h[0], c[0]]

    return step


def _dense_gru_step(cell: Any) -> Step:
    """Cho et al. 2014 through the ONNX GRU oracle, reset after the recurrent matmul (lbr = 1)."""
    w, r, _ = keras_to_onnx("gru", cell.wx.kernel.numpy(), cell.uh.kernel.numpy(), None)
    b = np.concatenate([cell.wx.bias.numpy(), cell.uh.bias.numpy()])[None]

    def step(x: Array, s: list[Array]) -> tuple[Array, list[Array]]:
        _, h = onnx_gru(x[None], w, r, b, initial_h=s[0][None], linear_before_reset=1)
        return h[0], [h[0]]

    return step


def _layer_norm_tanh_step(cell: Any) -> Step:
    """h' = tanh(LN(x·K + h·R)); LN per the Keras LayerNormalization docs: (v − mean) /
    sqrt(var + epsilon) · gamma + beta over the last axis (Ba et al. 2016)."""
    k, rk = cell.kernel.numpy().astype(np.float64), cell.recurrent_kernel.numpy().astype(np.float64)
    g, beta, eps = cell.norm.gamma.numpy(), cell.norm.beta.numpy(), float(cell.norm.epsilon)

    def step(x: Array, s: list[Array]) -> tuple[Array, list[Array]]:
        v = x @ k + s[0] @ rk
        mean, var = v.mean(-1, keepdims=True), v.var(-1, keepdims=True)
        h = np.tanh((v - mean) / np.sqrt(var + eps) * g + beta)
        return h, [h]

    return step


def _old_cell_peephole_step(cell: Any) -> Step:
    """An LSTM whose output-gate peephole reads c_{t−1} (not c_t); gates packed i, f, g, o."""
    k, rk, bias = (v.numpy().astype(np.float64) for v in (cell.kernel, cell.recurrent_kernel, cell.bias))
    pi, pf, po = (v.numpy().astype(np.float64) for v in (cell.p_i, cell.p_f, cell.p_o))

    def step(x: Array, s: list[Array]) -> tuple[Array, list[Array]]:
        h, c = s
        i, f, g, o = np.split(x @ k + h @ rk + bias, 4, axis=-1)
        c_new = sigmoid(f + pf * c) * c + sigmoid(i + pi * c) * np.tanh(g)
        h_new = sigmoid(o + po * c) * np.tanh(c_new)
        return h_new, [h_new, c_new]

    return step


CUSTOM = {  # cell class → (units, states, oracle step, ONNX op the export must hold)
    "PeepholeLSTMCell": (3, 2, _peephole_step, "LSTM"),
    "DenseGRUCell": (4, 1, _dense_gru_step, "GRU"),
    "LayerNormTanhCell": (3, 1, _layer_norm_tanh_step, "Scan"),
    "OldCellPeepholeLSTMCell": (2, 2, _old_cell_peephole_step, "Scan"),
}


def _custom_model(cells: Any, name: str, rng: np.random.Generator, **opts: Any) -> Any:
    k = km.keras()
    units = CUSTOM[name][0]

    def body(x: Any) -> list[Any]:
        m = k.layers.Masking(0.0)(x)
        seq = k.layers.RNN(getattr(cells, name)(units), return_sequences=True, return_state=True, name="seq",
                           **opts)(m)
        last = k.layers.RNN(getattr(cells, name)(units), name="last", **opts)(m)
        return [*seq, last]

    return km.functional((None, F), body, rng, name=f"masked_{name}")


@pytest.mark.parametrize("name", sorted(CUSTOM))
@pytest.mark.parametrize(("back", "zero"), [(False, False), (True, False), (False, True), (True, True)])
def test_masked_custom_cell_matches_keras_and_equations(cells: Any, name: str, back: bool, zero: bool,
                                                        rng: np.random.Generator) -> None:
    model = _custom_model(cells, name, rng, go_backwards=back, zero_output_for_mask=zero)
    onnx_model = km.export(model)
    units, n_states, oracle, op = CUSTOM[name]
    assert op in _ops(onnx_model) and ("Scan" in _ops(onnx_model)) == (op == "Scan")
    for pattern, mask in mask_patterns(rng, 4, 8).items():
        x = _masked_input(rng, mask)
        got = km.onnx_outputs(onnx_model, [x])
        km.assert_matches(got, _flat_keras(model, [x]), f"{name} vs Keras {pattern} back={back} zero={zero}")
        zeros = [np.zeros((4, units)) for _ in range(n_states)]
        seq, _, states = keras_masked_loop(oracle(model.get_layer("seq").cell), x, mask, zeros, back, zero)
        km.assert_matches(got[:1 + n_states], [seq, *states], f"{name} vs equations {pattern}")
        _, last, _ = keras_masked_loop(oracle(model.get_layer("last").cell), x, mask, zeros, back, zero)
        km.assert_matches([got[-1]], [last], f"{name} last output vs equations {pattern}")


def test_masked_scan_cell_keeps_initial_states(cells: Any, rng: np.random.Generator) -> None:
    k = km.keras()
    x_in = k.Input((None, F), name="x")
    inits = [k.Input((2,), name="h"), k.Input((2,), name="c")]
    masked = k.layers.Masking(0.0)(x_in)
    outs = k.layers.RNN(cells.OldCellPeepholeLSTMCell(2), return_sequences=True, return_state=True, name="seq")(
        masked, initial_state=inits, mask=masked._keras_mask)
    model = km.randomize(k.Model([x_in, *inits], outs), rng)
    mask = mask_patterns(rng, 4, 7)["holes"]  # row 1 has no valid step
    feeds = [_masked_input(rng, mask), *(rng.normal(size=(4, 2)).astype(np.float32) for _ in range(2))]
    onnx_model = km.export(model)
    assert "Scan" in _ops(onnx_model)
    got = km.onnx_outputs(onnx_model, feeds)
    km.assert_matches(got, _flat_keras(model, feeds), "scan initial state vs Keras")
    seq, _, states = keras_masked_loop(_old_cell_peephole_step(model.get_layer("seq").cell), feeds[0], mask,
                                       feeds[1:])
    km.assert_matches(got, [seq, *states], "scan initial state vs equations")
    np.testing.assert_array_equal(got[1][1], feeds[1][1])  # row 1: the initial state, carried
    assert not got[0][1].any()  # row 1: no valid step, so every output is the initial zero output


# ----- verify on padded windows ----------------------------------------------------------------

def test_verify_passes_on_padded_sets_and_a_padded_recording(cells: Any, tmp_path: Path,
                                                             rng: np.random.Generator) -> None:
    """verify compares every output and probe with Keras (the source framework) on the padded
    synthetic sets the export's ``seqgate.padding`` asks for, and on a recording with holes."""
    from seqgate.export.run import export_source
    from seqgate.verify.run import verify_model

    k = km.keras()

    def body(x: Any) -> Any:
        m = k.layers.Masking(0.0)(x)
        s = k.layers.RNN([k.layers.LSTMCell(3), k.layers.GRUCell(2)], return_sequences=True, go_backwards=True,
                           zero_output_for_mask=True, name="stack")(m)
        s = k.layers.RNN(cells.LayerNormTanhCell(3), return_sequences=True, go_backwards=True, name="ln")(s)
        return k.layers.RNN(cells.PeepholeLSTMCell(2), name="peep")(s)

    path = km.save(km.functional((None, F), body, rng, name="padded_cells"), tmp_path / "m.keras")
    res = export_source(str(path), tmp_path / "m.onnx")
    assert {"Scan", "LSTM", "GRU"} <= _ops(res.model)
    rep = verify_model(res.path, str(path), synthetic=True, batch_size=8)
    assert rep.passed, rep.headline()
    labels = {r["label"] for r in rep.recordings}
    assert {"synthetic:padded_left", "synthetic:padded_holes", "synthetic:padded_all"} <= labels, labels
    names = {t["name"] for t in rep.tensors}
    assert {"stack/cell0/reverse/hidden_sequence", "stack/cell1/reverse/hidden_final",
            "ln/reverse/hidden_sequence", "peep/forward/cell_final"} <= names, names
    mask = np.concatenate([mask_patterns(rng, 4, 12)[p] for p in ("right", "left", "holes")])
    np.savez(tmp_path / "padded.npz", x=_masked_input(rng, mask))
    rep = verify_model(res.path, str(path), recordings=[tmp_path / "padded.npz"], synthetic=False)
    assert rep.passed, rep.headline()
