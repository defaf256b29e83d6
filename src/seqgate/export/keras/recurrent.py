"""Keras SimpleRNN / GRU / LSTM / RNN(cell) / Bidirectional → one native ONNX recurrent node.

Output conventions reproduced (FACTS.md, pinned by the equivalence tests):

- ``go_backwards=True``: Keras returns the sequence in reversed time order; the ONNX node runs
  ``direction="reverse"`` (its Y stays in input order), so the sequence output is flipped.
  The final state is the reverse node's Y_h.
- ``Bidirectional``: the backward sequence comes back in input order, i.e. ONNX Y[:, 1];
  merge ``concat`` = [fwd | bwd], ``sum``, ``mul``, ``ave`` = (f + b)/2, ``None`` = two
  tensors; with ``return_state`` the states follow as fwd_h[, fwd_c], bwd_h[, bwd_c].
"""

from __future__ import annotations

from typing import Any

import numpy as np

from seqgate.errors import Refusal
from seqgate.export.core.builder import GraphBuilder
from seqgate.export.core.recurrent import stack_directions
from seqgate.export.core.rnn_nodes import RecurrentCall, RecurrentOut, emit_recurrent
from seqgate.export.keras import masked_recurrent as masked
from seqgate.export.keras.call import KerasCall
from seqgate.export.keras.cellparts import (
    builtin_cell,
    cell_slots,
    check_options,
    is_custom_cell,
    pack_cell,
    stateful_mark,
)
from seqgate.export.keras.masking import mask_of


def _cell_of(layer: Any, where: str) -> tuple[str, Any]:
    return builtin_cell(getattr(layer, "cell", None), where)


def _initial_states(b: GraphBuilder, call: KerasCall, n_dirs: int, kind: str) -> tuple[str, str]:
    """Keras initial_state tensors ([h] / [h, c] per direction) → ONNX initial_h, initial_c."""
    init = call.kwargs.get("initial_state")
    if init is None and len(call.args) > 1:
        init = call.args[1]
    if init is None:
        return "", ""
    tensors = list(init) if isinstance(init, list | tuple) else [init]
    per = 2 if kind == "lstm" else 1
    if len(tensors) != per * n_dirs:
        raise Refusal(f"initial_state has {len(tensors)} tensors, expected {per * n_dirs}")
    vals = [call.value_of(t).name for t in tensors]
    hs = [b.unsqueeze(vals[d * per], [0]) for d in range(n_dirs)]
    h = hs[0] if n_dirs == 1 else b.op("Concat", hs, axis=0)
    if kind != "lstm":
        return h, ""
    cs = [b.unsqueeze(vals[d * per + 1], [0]) for d in range(n_dirs)]
    c = cs[0] if n_dirs == 1 else b.op("Concat", cs, axis=0)
    return h, c


def emit_keras_rnn(b: GraphBuilder, call: KerasCall) -> list[str]:
    """SimpleRNN, GRU, LSTM and RNN(built-in cell)."""
    layer = call.layer
    if type(getattr(layer, "cell", None)).__name__ == "StackedRNNCells":
        from seqgate.export.keras.stacked import emit_stacked_rnn

        return emit_stacked_rnn(b, call)
    if is_custom_cell(getattr(layer, "cell", None)):
        from seqgate.export.keras.customcells import emit_custom_cell_rnn

        return emit_custom_cell_rnn(b, call)
    kind, cell = _cell_of(layer, call.name)
    check_options(layer)
    x = call.inputs[0]
    if x.rank != 3:
        raise Refusal(f"input of rank {x.rank}, expected [batch, time, features]")
    back = bool(layer.go_backwards)
    rc = RecurrentCall(
        kind=kind, hidden=int(cell.units), direction="reverse" if back else "forward",
        packed=pack_cell(kind, cell), activations=cell_slots(kind, cell), layer=call.name,
        source={"framework": "keras", "layer": call.name, "go_backwards": back,
                "return_sequences": bool(layer.return_sequences),
                **stateful_mark(layer)},
    )
    h0, c0 = _initial_states(b, call, 1, kind)
    seqs, state = bool(layer.return_sequences), bool(layer.return_state)
    mask = mask_of(call)
    if mask is not None:
        return _masked_rnn(b, rc, x.name, mask, (h0, c0), seqs, state, bool(layer.zero_output_for_mask))
    xt = b.transpose(x.name, [1, 0, 2])
    out = emit_recurrent(b, rc, xt, h0, c0, need_y=seqs, need_h=True, need_c=state and kind == "lstm")
    h = b.squeeze(out.y_h, [0])
    results: list[str] = []
    if seqs:
        y = b.squeeze(out.y, [1])  # [T, N, H]
        if back:
            y = b.reverse_time(y, 0)
        results.append(b.transpose(y, [1, 0, 2]))
    else:
        results.append(h)
    if state:
        results.append(h)
        if kind == "lstm":
            results.append(b.squeeze(out.y_c, [0]))
    return results


def _masked_rnn(b: GraphBuilder, rc: RecurrentCall, x: str, mask: Any, init: tuple[str, str],
                seqs: bool, state: bool, zero: bool) -> list[str]:
    """A masked SimpleRNN/GRU/LSTM (``masked_recurrent``); go_backwards = direction reverse."""
    back = rc.direction == "reverse"
    run = masked.run_masked(b, rc, x, mask, init[0], init[1], need_y=seqs)
    results: list[str] = []
    seq_slots = None
    if seqs:
        seq, slot = masked.sequence_at_positions(b, run, 0, reverse=back, zero_masked=zero)
        seq_slots = [slot]
        results.append(b.reverse_time(seq, 1) if back else seq)
    else:
        results.append(masked.last_output(b, run, 0, reverse=back, zero_masked=zero))
    if state:
        results.append(masked.state_of(b, run.h, 0))
        if run.c is not None:
            results.append(masked.state_of(b, run.c, 0))
    masked.register(b, rc, run, seq_slots)
    return results


def _same_config(fw: Any, bw: Any) -> None:
    keys = ("units", "activation", "recurrent_activation", "use_bias", "return_sequences",
            "return_state", "reset_after")
    fc, bc = fw.get_config(), bw.get_config()
    diff = [k for k in keys if fc.get(k) != bc.get(k)]
    if type(fw) is not type(bw) or diff:
        raise Refusal(f"backward layer differs from the forward layer in {diff or ['class']}",
                      "use the same layer settings in both directions")


def emit_keras_bidirectional(b: GraphBuilder, call: KerasCall) -> list[str]:
    """Bidirectional(SimpleRNN/GRU/LSTM) with every merge mode, incl. None."""
    layer = call.layer
    fw, bw = layer.forward_layer, layer.backward_layer
    kind, fcell = _cell_of(fw, call.name)
    _, bcell = _cell_of(bw, call.name)
    check_options(fw, bidirectional=True)
    _same_config(fw, bw)
    if fw.go_backwards or not bw.go_backwards:
        raise Refusal("Bidirectional around a layer with go_backwards=True",
                      "wrap a layer with go_backwards=False")
    x = call.inputs[0]
    if x.rank != 3:
        raise Refusal(f"input of rank {x.rank}, expected [batch, time, features]")
    mode = layer.merge_mode
    if mode not in ("concat", "sum", "mul", "ave", None):
        raise Refusal(f"merge_mode={mode!r}")
    rc = RecurrentCall(
        kind=kind, hidden=int(fcell.units), direction="bidirectional",
        packed=stack_directions([pack_cell(kind, fcell), pack_cell(kind, bcell)]),
        activations=cell_slots(kind, fcell) + cell_slots(kind, bcell), layer=call.name,
        source={"framework": "keras", "layer": call.name, "wrapper": "Bidirectional",
                "merge_mode": mode, "return_sequences": bool(fw.return_sequences)},
        per_direction_source=[
            {"sublayer": "forward_layer", "sublayer_name": fw.name, "go_backwards": False},
            {"sublayer": "backward_layer", "sublayer_name": bw.name, "go_backwards": True},
        ],
    )
    h0, c0 = _initial_states(b, call, 2, kind)
    seqs, state = bool(fw.return_sequences), bool(fw.return_state)
    mask = mask_of(call)
    if mask is not None:
        zero = (bool(fw.zero_output_for_mask), bool(bw.zero_output_for_mask))
        return _masked_bidirectional(b, rc, x.name, mask, (h0, c0), mode, seqs, state, zero)
    xt = b.transpose(x.name, [1, 0, 2])
    out = emit_recurrent(b, rc, xt, h0, c0, need_y=seqs, need_h=True, need_c=state and kind == "lstm")
    results = _merge_sequences(b, out, mode, rc.hidden) if seqs else _merge_finals(b, out, mode, rc.hidden)
    if state:
        for d in range(2):
            results.append(_pick(b, out.y_h, d))
            if kind == "lstm":
                results.append(_pick(b, out.y_c, d))
    return results


def _masked_bidirectional(b: GraphBuilder, rc: RecurrentCall, x: str, mask: Any, init: tuple[str, str],
                          mode: str | None, seqs: bool, state: bool, zero: tuple[bool, bool]) -> list[str]:
    """A masked Bidirectional: one bidirectional node over the compacted steps, merged as Keras."""
    run = masked.run_masked(b, rc, x, mask, init[0], init[1], need_y=seqs)
    seq_slots = None
    if seqs:
        pairs = [masked.sequence_at_positions(b, run, d, reverse=d == 1, zero_masked=zero[d]) for d in range(2)]
        seq_slots = [p[1] for p in pairs]
        parts = [p[0] for p in pairs]
    else:
        parts = [masked.last_output(b, run, d, reverse=d == 1, zero_masked=zero[d]) for d in range(2)]
    results = _merge_parts(b, parts, mode)
    if state:
        for d in range(2):
            results.append(masked.state_of(b, run.h, d))
            if run.c is not None:
                results.append(masked.state_of(b, run.c, d))
    masked.register(b, rc, run, seq_slots)
    return results


def _merge_parts(b: GraphBuilder, parts: list[str], mode: str | None) -> list[str]:
    """Keras Bidirectional merge of [forward, backward] on the last axis."""
    f, bw = parts
    if mode is None:
        return [f, bw]
    if mode == "concat":
        return [b.op("Concat", [f, bw], axis=-1)]
    if mode == "ave":
        return [b.op("Div", [b.op("Add", [f, bw]), b.scalar(2.0, "two")])]
    return [b.op("Add" if mode == "sum" else "Mul", [f, bw])]


def _pick(b: GraphBuilder, x: str, index: int, axis: int = 0) -> str:
    return b.op("Gather", [x, b.const(np.asarray(index, np.int64), "index")], axis=axis)


_REDUCE = {"sum": "ReduceSum", "mul": "ReduceProd", "ave": "ReduceMean"}


def _merge_sequences(b: GraphBuilder, out: RecurrentOut, mode: str | None, hidden: int) -> list[str]:
    y = out.y  # [T, 2, N, H]
    if mode is None:
        return [b.transpose(_pick(b, y, d, axis=1), [1, 0, 2]) for d in range(2)]
    if mode == "concat":
        return [b.reshape(b.transpose(y, [2, 0, 1, 3]), [0, 0, 2 * hidden])]
    return [b.transpose(b.reduce(_REDUCE[mode], y, [1], keepdims=False), [1, 0, 2])]


def _merge_finals(b: GraphBuilder, out: RecurrentOut, mode: str | None, hidden: int) -> list[str]:
    h = out.y_h  # [2, N, H]
    if mode is None:
        return [_pick(b, h, 0), _pick(b, h, 1)]
    if mode == "concat":
        return [b.reshape(b.transpose(h, [1, 0, 2]), [0, 2 * hidden])]
    return [b.reduce(_REDUCE[mode], h, [0], keepdims=False)]


RECURRENT_LAYERS: dict[str, Any] = {
    "SimpleRNN": emit_keras_rnn,
    "GRU": emit_keras_rnn,
    "LSTM": emit_keras_rnn,
    "RNN": emit_keras_rnn,
    "Bidirectional": emit_keras_bidirectional,
}
