"""Hand-written PyTorch cells recognised as ONE native ONNX node, near misses kept as an exact Scan.

Each recognised form is checked three ways: against PyTorch itself (the traced module), against
the NumPy float64 reading of the published equations in ``reference_equations`` (ONNX LSTM/GRU/
RNN spec; Hochreiter & Schmidhuber 1997 with the forget gate, Cho et al. 2014, Elman 1990), fed
the cell's own per-gate weights (read by name, not from the export), and against
``onnx.reference`` (which supports these default activations, ``linear_before_reset`` and
peepholes per FACTS.md). Near misses must not become native nodes (op types asserted) and must
still match PyTorch exactly through the Scan.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
import torch
from onnx.reference import ReferenceEvaluator

import torch_user_cells as U
from reference_equations import onnx_gru, onnx_lstm, onnx_rnn
from torch_cell_models import H
from torch_models import export, run_onnx, torch_outputs, worst

torch.set_num_threads(1)
NATIVE = ("LSTM", "GRU", "RNN")


def _ops(model: Any) -> list[str]:
    return [n.op_type for n in model.graph.node]


def _run(factory: Any, t: int = 6, seed: int = 0) -> tuple[Any, Any, np.ndarray, list[np.ndarray]]:
    m = factory()
    model = export(m)
    x = np.random.default_rng(seed).normal(size=(3, t, 3)).astype(np.float32)
    got = run_onnx(model, {"x": x})
    worst(torch_outputs(m, {"x": x}), got)  # reference: PyTorch running the module
    return m, model, x, got


def _w(cell: Any, name: str) -> np.ndarray:
    return getattr(cell, name).weight.detach().numpy().astype(np.float64)


def _b(cell: Any, name: str) -> np.ndarray:
    lin = getattr(cell, name)
    return np.zeros(H) if lin.bias is None else lin.bias.detach().numpy().astype(np.float64)


def _gates(cell: Any, order: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """W [1, G·H, I], R [1, G·H, H], Wb (input biases) in the given ONNX gate order."""
    w = np.concatenate([_w(cell, f"W_{g}") for g in order])[None]
    r = np.concatenate([_w(cell, f"U_{g}") for g in order])[None]
    return w, r, np.concatenate([_b(cell, f"W_{g}") for g in order])


def _head(m: Any, seq: np.ndarray) -> np.ndarray:
    return seq @ m.fc.weight.detach().numpy().T + m.fc.bias.detach().numpy()


def _oracle(model: Any, x: np.ndarray, got: list[np.ndarray]) -> None:
    """onnx.reference evaluates the same file (a second runtime; supports these attributes)."""
    ref = ReferenceEvaluator(model).run(None, {"x": x})
    worst(ref, got, atol=1e-5, rtol=1e-5)


def test_hand_written_lstm_is_one_native_lstm() -> None:
    m, model, x, got = _run(U.make_hand_lstm, 7, 1)
    assert _ops(model).count("LSTM") == 1 and "Scan" not in _ops(model)
    # ONNX LSTM spec / Hochreiter & Schmidhuber 1997 with the forget gate; ONNX gate order i, o, f, c
    w, r, wb = _gates(m.cell, "iofg")
    y, y_h, _ = onnx_lstm(x.transpose(1, 0, 2), w, r, np.concatenate([wb, np.zeros(4 * H)])[None])
    worst([_head(m, y[:, 0].transpose(1, 0, 2)), y_h[0]], got)
    _oracle(model, x, got)


@pytest.mark.parametrize(("factory", "lbr"), [(U.make_gru_reset_inside, 0), (U.make_gru_reset_outside, 1)])
def test_hand_written_gru_is_one_native_gru_either_reset_placement(factory: Any, lbr: int) -> None:
    m, model, x, got = _run(factory, 8, 2)
    (node,) = [n for n in model.graph.node if n.op_type in NATIVE]
    assert node.op_type == "GRU" and "Scan" not in _ops(model)
    attrs = {a.name: a.i for a in node.attribute if a.name == "linear_before_reset"}
    assert attrs.get("linear_before_reset", 0) == lbr
    # ONNX GRU spec / Cho et al. 2014, gates z, r, h; R_bh = U_n's bias (reset outside only)
    w, r, wb = _gates(m.cell, "zrn")
    rb = np.concatenate([np.zeros(2 * H), _b(m.cell, "U_n")])
    y, y_h = onnx_gru(x.transpose(1, 0, 2), w, r, np.concatenate([wb, rb])[None], linear_before_reset=lbr)
    worst([_head(m, y[:, 0].transpose(1, 0, 2)), y_h[0]], got)
    _oracle(model, x, got)


def test_hand_written_elman_is_one_native_rnn() -> None:
    m, model, x, got = _run(U.make_elman, 5, 3)
    assert _ops(model).count("RNN") == 1 and "Scan" not in _ops(model)
    w, r, wb = _gates(m.cell, "h")  # Elman 1990 / ONNX RNN spec: H_t = tanh(X W^T + H R^T + Wb)
    y, y_h = onnx_rnn(x.transpose(1, 0, 2), w, r, np.concatenate([wb, np.zeros(H)])[None])
    worst([_head(m, y[:, 0].transpose(1, 0, 2)), y_h[0]], got)
    _oracle(model, x, got)


@pytest.mark.parametrize("factory", [U.make_old_cell_output_peephole, U.make_lstm_with_skip,
                                     U.make_gru_update_on_candidate])
def test_near_misses_stay_an_exact_scan(factory: Any) -> None:
    _, model, _, _ = _run(factory, 6, 4)  # exact against PyTorch (checked inside)
    assert "Scan" in _ops(model) and not set(_ops(model)) & set(NATIVE)


def test_matcher_names_what_differs() -> None:
    from seqgate.export.core.cellmatch import match_step

    reasons = {}
    for name, factory in (("peephole", U.make_old_cell_output_peephole), ("skip", U.make_lstm_with_skip),
                          ("update", U.make_gru_update_on_candidate)):
        cell = factory().cell
        wrapped = U.UserCellOverTime(cell, name != "update")
        model = export(wrapped)
        (scan,) = [n for n in model.graph.node if n.op_type == "Scan"]
        body = scan.attribute[0].g
        found, why = match_step(body, len(body.input) - 1)
        assert found is None
        reasons[name] = why
    assert "wrong cell state" in reasons["peephole"]
    assert "not o ⊙ act(c)" in reasons["skip"]
    assert "1 − z" in reasons["update"]
