"""``nn.LSTM(proj_size=P > 0)`` → one ONNX ``Scan`` per layer and direction.

The native ONNX LSTM has no projection, so each layer/direction is a ``Scan`` whose body is
PyTorch's documented step (``torch.nn.LSTM``, gate order i, f, g, o):

    gates = X_t·W_ihᵀ + b_ih + h_{t−1}·W_hhᵀ + b_hh        [N, 4H]
    i, f, g, o = σ(gates_i), σ(gates_f), tanh(gates_g), σ(gates_o)
    c_t = f ⊙ c_{t−1} + i ⊙ g                                [N, H]
    h_t = (o ⊙ tanh(c_t))·W_hrᵀ                              [N, P]

The input term ``X·W_ihᵀ + b_ih + b_hh`` is one MatMul over all steps before the Scan (it does
not depend on the state). The reverse direction scans the input and writes its outputs in
reverse (``scan_*_directions = 1``), so Y[t] is the state after consuming X[t], as in PyTorch.
Layer k+1 reads ``concat_d(Y_k,d)`` ``[T, N, D·P]``; ``h_n`` is ``[L·D, N, P]`` and ``c_n``
``[L·D, N, H]``, both ordered l0-fwd, l0-bwd, l1-fwd, …; absent initial states are zeros.

Probes ``<prefix>/l<k>/<forward|reverse>/{hidden_sequence, hidden_final, cell_final}`` read the
per-layer values ``[T, N, D, P]`` and ``[D, N, P|H]``; hidden sizes in them are P for h, H for c.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from onnx import TensorProto, helper

from seqgate.export.core.builder import FLOAT, GraphBuilder
from seqgate.export.core.scanbody import prefix_names
from seqgate.export.torch.values import TV
from seqgate.onnxfile.probes import Probe

_LABELS = ("forward", "reverse")


def _np(t: Any) -> np.ndarray[Any, Any]:
    return t.detach().cpu().numpy().astype(np.float32)


def _body(b: GraphBuilder, w_hh: np.ndarray[Any, Any], w_hr: np.ndarray[Any, Any], scope: str) -> Any:
    """The Scan body of one direction: inputs (h, c, x-term), outputs (h', c', h')."""
    hidden, proj = w_hh.shape[0] // 4, w_hr.shape[0]
    sub = GraphBuilder(b.opset, graph_name="lstm_projected_step", framework="torch")
    h, c = sub.input("h", FLOAT, ["batch", proj]), sub.input("c", FLOAT, ["batch", hidden])
    xg = sub.input("x_gates", FLOAT, ["batch", 4 * hidden])
    gates = sub.op("Add", [xg, sub.op("MatMul", [h, sub.const(np.ascontiguousarray(w_hh.T), "w_hh_t")])])
    i, f, g, o = sub.node("Split", [gates, sub.ints([hidden] * 4, "split")], 4, axis=1)
    i, f, o = (sub.op("Sigmoid", [v]) for v in (i, f, o))
    c_new = sub.op("Add", [sub.op("Mul", [f, c]), sub.op("Mul", [i, sub.op("Tanh", [g])])])
    h_new = sub.op("MatMul", [sub.op("Mul", [o, sub.op("Tanh", [c_new])]),
                              sub.const(np.ascontiguousarray(w_hr.T), "w_hr_t")])
    sub.output(h_new, "h_out", FLOAT, ["batch", proj])
    sub.output(c_new, "c_out", FLOAT, ["batch", hidden])
    sub.output(sub.op("Identity", [h_new]), "y_out", FLOAT, ["batch", proj])
    graph = sub.build({}, check=False).graph
    prefix_names(graph, f"{scope}/step/")
    return graph


def _direction(b: GraphBuilder, m: Any, k: int, d: int, x: str, h0: str, c0: str) -> tuple[str, str, str]:
    """Scan of layer k, direction d over time-major ``x``: (Y [T, N, P], h_T [N, P], c_T [N, H])."""
    sfx = "_reverse" if d else ""
    w_ih, w_hh = _np(getattr(m, f"weight_ih_l{k}{sfx}")), _np(getattr(m, f"weight_hh_l{k}{sfx}"))
    w_hr = _np(getattr(m, f"weight_hr_l{k}{sfx}"))
    bias = np.zeros(w_ih.shape[0], np.float32)
    if m.bias:
        bias = _np(getattr(m, f"bias_ih_l{k}{sfx}")) + _np(getattr(m, f"bias_hh_l{k}{sfx}"))
    xw = b.op("MatMul", [x, b.const(np.ascontiguousarray(w_ih.T), "w_ih_t")])
    xg = b.op("Add", [xw, b.const(bias, "bias")])
    body = _body(b, w_hh, w_hr, f"{b.fresh('scan')}")
    h_t, c_t, y = b.fresh("h_final"), b.fresh("c_final"), b.fresh("y")
    b.node("Scan", [h0, c0, xg], [h_t, c_t, y], body=body, num_scan_inputs=1,
           scan_input_directions=[d], scan_output_directions=[d])
    return y, h_t, c_t


def _initial(b: GraphBuilder, s: TV | None, x: str, row: int, size: int) -> str:
    """Row ``row`` of a given ``[L·D, N, S]`` state, or zeros ``[N, size]`` for the batch of ``x``."""
    if s is not None:
        return b.squeeze(b.slice(s.name, [row], [row + 1], [0]), [0])
    shape = b.op("Concat", [b.op("Shape", [x], start=1, end=2), b.ints([size], "size")], axis=0)
    return b.op("ConstantOfShape", [shape], value=helper.make_tensor("zero", TensorProto.FLOAT, [1], [0.0]))


def projected_lstm(b: GraphBuilder, m: Any, x: str, h0: TV | None, c0: TV | None, prefix: str,
                   source: dict[str, Any]) -> tuple[str, str, str]:
    """Every layer of a projected LSTM over time-major ``x`` (module docstring): (Y, h_n, c_n)."""
    dirs, hidden, proj = (2 if m.bidirectional else 1), int(m.hidden_size), int(m.proj_size)
    hs: list[str] = []
    cs: list[str] = []
    inp = x
    for k in range(int(m.num_layers)):
        runs = []
        for d in range(dirs):
            row = k * dirs + d
            h_init, c_init = _initial(b, h0, x, row, proj), _initial(b, c0, x, row, hidden)
            runs.append(_direction(b, m, k, d, inp, h_init, c_init))
        y4 = _stack(b, [r[0] for r in runs], 2)  # [T, N, D, P]
        h3 = _stack(b, [r[1] for r in runs], 0)  # [D, N, P]
        c3 = _stack(b, [r[2] for r in runs], 0)  # [D, N, H]
        _probes(b, m, k, dirs, prefix, source, (y4, h3, c3))
        y4, h3, c3 = y4[0], h3[0], c3[0]
        hs.append(h3)
        cs.append(c3)
        inp = b.squeeze(y4, [2]) if dirs == 1 else b.reshape(y4, [0, 0, -1])
    h_n = hs[0] if len(hs) == 1 else b.op("Concat", hs, axis=0)
    c_n = cs[0] if len(cs) == 1 else b.op("Concat", cs, axis=0)
    return inp, h_n, c_n


def _stack(b: GraphBuilder, parts: list[str], axis: int) -> tuple[str, str]:
    """Directions stacked on a new ``axis``: (value, name of the node that makes it)."""
    ups = [b.unsqueeze(p, [axis]) for p in parts]
    v = ups[0] if len(ups) == 1 else b.op("Concat", ups, axis=axis)
    return v, b.last_node_name


def _probes(b: GraphBuilder, m: Any, k: int, dirs: int, prefix: str, source: dict[str, Any],
            values: tuple[tuple[str, str], ...]) -> None:
    src = {**source, "layer_index": k, "proj_size": int(m.proj_size), "exported_as": "Scan"}
    kinds = (("hidden_sequence", "TNDH"), ("hidden_final", "DNH"), ("cell_final", "DNH"))
    for d in range(dirs):
        for (kind, axes), (value, node) in zip(kinds, values, strict=True):
            b.probe(Probe(name=f"{prefix}/l{k}/{_LABELS[d]}/{kind}", kind=kind, layer=source["module"],
                          direction=_LABELS[d], direction_index=d, node=node, output_index=0, value=value,
                          axes=axes, stack_index=k, source=src))
