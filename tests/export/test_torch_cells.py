"""PyTorch cells (nn.LSTMCell/GRUCell/RNNCell) run step by step in Python loops.

External references: ``torch_reference`` implements the step equations of the PyTorch
documentation (LSTM: Hochreiter & Schmidhuber 1997 with the forget gate of Gers, Schmidhuber &
Cummins 2000; GRU: Cho et al. 2014 in PyTorch's form with r applied to ``W_hn h + b_hn``;
Elman RNN) in float64, independent of seqgate's gate tables; ``onnx.reference`` is onnx's own
evaluator. Tolerance: ``1e-4 + 1e-4·|ref|`` (the project's float32 rule, ``torch_models.worst``).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
import torch
from onnx.reference import ReferenceEvaluator
from typer.testing import CliRunner

import torch_cell_models as M
from reference_equations import onnx_lstm
from seqgate.cli.app import app
from seqgate.errors import UnsupportedModelError
from seqgate.onnxfile.probes import read_probe_map, to_canonical, with_probe_outputs
from torch_models import export, run_onnx, torch_outputs, worst
from torch_reference import gru_step, lstm_step, rnn_step

torch.set_num_threads(1)
RECURRENT = ("LSTM", "GRU", "RNN")


def _params(cell: Any) -> list[np.ndarray]:
    return [p.detach().numpy().astype(np.float64) for p in (cell.weight_ih, cell.weight_hh, cell.bias_ih,
                                                            cell.bias_hh)]


def _ops(model: Any) -> list[str]:
    return [n.op_type for n in model.graph.node]


def _x(seed: int, n: int, t: int, i: int = M.IN) -> np.ndarray:
    return np.random.default_rng(seed).normal(size=(n, t, i)).astype(np.float32)


def test_lstm_cell_loop_is_one_native_lstm_over_a_dynamic_time_axis() -> None:
    m = M.make_lstm_loop()
    model = export(m)
    assert _ops(model).count("LSTM") == 1 and not {"Loop", "Scan"} & set(_ops(model))
    dims = [d.dim_param or d.dim_value for d in model.graph.input[0].type.tensor_type.shape.dim]
    assert dims == ["batch", "time", M.IN]
    for t in (5, 31):  # neither sample length used by the capture (13, 17)
        x = _x(t, 2, t)
        got = run_onnx(model, {"x": x})
        worst(torch_outputs(m, {"x": x}), got)
        # PyTorch docs LSTM equations (Hochreiter & Schmidhuber 1997, forget gate per Gers et al. 2000)
        w_ih, w_hh, b_ih, b_hh = _params(m.cell)
        h = c = np.zeros((2, M.H))
        hs = []
        for k in range(t):
            h, c = lstm_step(x[:, k].astype(np.float64), h, c, w_ih, w_hh, b_ih, b_hh)
            hs.append(h)
        fc_w, fc_b = m.fc.weight.detach().numpy(), m.fc.bias.detach().numpy()
        worst([np.stack(hs, 1) @ fc_w.T + fc_b, h, c], got)
    # onnx's own evaluator (supports default LSTM activations, FACTS.md)
    ref = ReferenceEvaluator(model).run(None, {"x": x})
    worst(ref, got)


def test_lstm_cell_loop_probes_hold_every_step() -> None:
    m = M.make_lstm_loop()
    model = export(m)
    probes = {p.name: p for p in read_probe_map(model)}
    assert set(probes) == {f"cell/forward/{k}" for k in ("hidden_sequence", "hidden_final", "cell_final")}
    x = _x(7, 3, 9)
    full = with_probe_outputs(model, list(probes.values()))
    from torch_models import session

    sess = session(full)
    names = [o.name for o in sess.get_outputs()]
    vals = dict(zip(names, sess.run(None, {"x": x}), strict=True))
    seq_probe = probes["cell/forward/hidden_sequence"]
    seq = to_canonical(seq_probe, vals[seq_probe.value])
    w_ih, w_hh, b_ih, b_hh = _params(m.cell)
    h = c = np.zeros((3, M.H))
    for k in range(9):  # PyTorch docs LSTM equations, step by step
        h, c = lstm_step(x[:, k].astype(np.float64), h, c, w_ih, w_hh, b_ih, b_hh)
        worst([h], [seq[:, k, 0]])


def test_gru_cell_unbind_loop_is_one_native_gru() -> None:
    m = M.make_gru_unbind()
    model = export(m)
    assert [o for o in _ops(model) if o in RECURRENT] == ["GRU"]
    x = _x(3, 4, 11)
    got = run_onnx(model, {"x": x})
    worst(torch_outputs(m, {"x": x}), got)
    w_ih, w_hh, b_ih, b_hh = _params(m.cell)
    h = np.zeros((4, M.H))
    for k in range(11):  # GRU, Cho et al. 2014 in the PyTorch docs' form
        h = gru_step(x[:, k].astype(np.float64), h, w_ih, w_hh, b_ih, b_hh)
    worst([h @ m.fc.weight.detach().numpy().T.astype(np.float64) + m.fc.bias.detach().numpy()], got)
    worst(ReferenceEvaluator(model).run(None, {"x": x}), got)  # onnx.reference: GRU linear_before_reset


def test_rnn_cell_fixed_length_loop_is_one_native_rnn() -> None:
    m = M.make_rnn_fixed()
    model = export(m, ["x:batch,12,3"])
    assert [o for o in _ops(model) if o in RECURRENT] == ["RNN"]
    x = _x(4, 2, 12)
    got = run_onnx(model, {"x": x})
    worst(torch_outputs(m, {"x": x}), got)
    w_ih, w_hh, b_ih, b_hh = _params(m.cell)
    h = np.zeros((2, M.H))
    hs = []
    for k in range(12):  # Elman RNN with ReLU, PyTorch docs (torch.nn.RNN)
        h = rnn_step(x[:, k].astype(np.float64), h, w_ih, w_hh, b_ih, b_hh, relu=True)
        hs.append(h)
    worst([np.stack(hs, 1)], got)


def test_decoder_fed_its_prediction_is_unrolled_one_step_nodes() -> None:
    m = M.make_decoder()
    model = export(m)
    lstm_nodes = [n for n in model.graph.node if n.op_type == "LSTM"]
    assert len(lstm_nodes) == 1 + M.Seq2SeqDecoder.horizon
    x = _x(5, 3, 8)
    got = run_onnx(model, {"x": x})
    worst(torch_outputs(m, {"x": x}), got)
    # NumPy: encoder then H decoder steps, each PyTorch docs LSTM equations
    p = {k: v.detach().numpy().astype(np.float64) for k, v in m.enc.state_dict().items()}
    h = c = np.zeros((3, M.H))
    for k in range(8):
        h, c = lstm_step(x[:, k].astype(np.float64), h, c, p["weight_ih_l0"], p["weight_hh_l0"],
                         p["bias_ih_l0"], p["bias_hh_l0"])
    y = x[:, -1, :1].astype(np.float64)
    w_ih, w_hh, b_ih, b_hh = _params(m.dec)
    ow, ob = m.out.weight.detach().numpy().astype(np.float64), m.out.bias.detach().numpy()
    preds = []
    for _ in range(M.Seq2SeqDecoder.horizon):
        h, c = lstm_step(y, h, c, w_ih, w_hh, b_ih, b_hh)
        y = h @ ow.T + ob
        preds.append(y)
    worst([np.concatenate(preds, 1)], got)
    names = {p.name for p in read_probe_map(model)}
    assert {f"dec/call{i}/forward/hidden_final" for i in range(4)} <= names


def test_near_miss_head_inside_the_loop_is_refused_naming_the_cell() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(M.make_head_inside())
    text = str(e.value)
    assert "cell (LSTMCell) in a loop over time" in text and "read by fc inside the loop" in text


def test_near_miss_swapped_state_is_refused() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(M.make_swapped())
    assert "state other than its own previous output" in str(e.value)


class _Unsupported(torch.nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.cell = torch.nn.GRUCell(M.IN, M.H)

    def forward(self, x: Any) -> Any:
        h = torch.zeros(x.size(0), M.H)
        for t in range(12):
            h = self.cell(torch.special.erfcx(x[:, t]), h)
        return h


def test_a_refusal_inside_an_unrolled_loop_is_reported_once() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(_Unsupported().eval(), ["x:batch,12,3"])
    text = str(e.value)
    assert text.count("\n  - ") == 1 and "special_erfcx is not supported" in text, text


@pytest.mark.parametrize("factory", ["make_lstm_loop", "make_decoder", "make_gru_unbind"])
def test_cli_export_and_verify_cell_models(tmp_path: Path, factory: str) -> None:
    src = f"{Path(M.__file__)}:{factory}"
    torch.save(getattr(M, factory)().state_dict(), tmp_path / "w.pt")
    runner = CliRunner()
    r = runner.invoke(app, ["export", src, "--weights", str(tmp_path / "w.pt"), "-o", str(tmp_path / "m.onnx")])
    assert r.exit_code == 0, r.output
    r = runner.invoke(app, ["verify", str(tmp_path / "m.onnx"), "--source", src, "--weights",
                            str(tmp_path / "w.pt"), "--synthetic", "--quiet"])
    assert r.exit_code == 0, r.output


# ----- user-written cells: an ONNX Scan whose body is the cell's step ---------------------------
def _user_run(factory: Any, t: int, seed: int) -> tuple[Any, Any, np.ndarray, list[np.ndarray]]:
    m = factory()
    model = export(m)
    x = _x(seed, 2, t)
    got = run_onnx(model, {"x": x})
    worst(torch_outputs(m, {"x": x}), got)
    return m, model, x, got


def blocks(a: np.ndarray) -> np.ndarray:
    """The cell's gate blocks i, f, g, o in the ONNX LSTM order i, o, f, c (operator spec)."""
    return np.concatenate([np.split(a, 4)[k] for k in (0, 3, 1, 2)])


def test_peephole_lstm_cell_is_one_native_lstm_matching_the_published_equations() -> None:
    for t in (4, 23):
        m, model, x, got = _user_run(M.make_peephole, t, t)
        # recognised structurally (core.cellmatch): ONE native LSTM with the P input, no Scan
        assert "Scan" not in _ops(model) and _ops(model).count("LSTM") == 1
        (node,) = [n for n in model.graph.node if n.op_type == "LSTM"]
        assert len(node.input) == 8 and node.input[7]
        # ONNX LSTM spec with peepholes P = [Pi, Po, Pf] (Gers & Schmidhuber 2000: i, f see C_{t−1},
        # o sees C_t), NumPy float64 in reference_equations; the cell's blocks are i, f, g, o.
        cell = m.cell
        wx = cell.W.weight.detach().numpy().astype(np.float64)
        wh = cell.U.weight.detach().numpy().astype(np.float64)
        bx = cell.W.bias.detach().numpy().astype(np.float64)
        p = np.concatenate([cell.w_ci.detach().numpy(), cell.w_co.detach().numpy(), cell.w_cf.detach().numpy()])
        y, y_h, _ = onnx_lstm(x.transpose(1, 0, 2), blocks(wx)[None], blocks(wh)[None],
                              np.concatenate([blocks(bx), np.zeros(4 * M.H)])[None], P=p[None])
        seq = y[:, 0].transpose(1, 0, 2)
        fc_w, fc_b = m.fc.weight.detach().numpy(), m.fc.bias.detach().numpy()
        worst([seq @ fc_w.T + fc_b, y_h[0]], got)


def test_minimal_gated_unit_scan_matches_its_equations() -> None:
    m, model, x, got = _user_run(M.make_mgu, 9, 1)
    assert "Scan" in _ops(model)
    c = m.cell
    w = {k: v.detach().numpy().astype(np.float64) for k, v in c.state_dict().items()}
    h = np.zeros((2, M.H))
    for k in range(9):  # minimal gated unit (Zhou et al. 2016), as written in the cell's docstring
        xt = x[:, k].astype(np.float64)
        f = 1 / (1 + np.exp(-(xt @ w["wf.weight"].T + w["wf.bias"] + h @ w["uf.weight"].T)))
        cand = np.tanh(xt @ w["wh.weight"].T + w["wh.bias"] + (f * h) @ w["uh.weight"].T)
        h = (1 - f) * h + f * cand
    worst([h], [got[1]])


def test_near_miss_tanh_forget_gate_is_not_an_lstm_node() -> None:
    _, model, _, _ = _user_run(M.make_tanh_forget, 7, 2)  # exact against torch (checked inside)
    assert "LSTM" not in _ops(model) and "Scan" in _ops(model)


@pytest.mark.parametrize("factory", ["make_peephole", "make_mgu"])
def test_cli_verify_user_cells_with_state_probes(tmp_path: Path, factory: str) -> None:
    test_cli_export_and_verify_cell_models(tmp_path, factory)
