"""Keras ``RNN(custom cell)`` → one native ONNX node when the step is proven one, else a ``Scan``.

Custom cell classes exist only when the user opted in to running their code (``--custom-code
FILE.py``, ``sources.keras``). The cell's ``call`` is traced symbolically into a step graph
(``cellstep``); ``core.cellmatch`` then decides, structurally:

- a plain or peephole LSTM, a GRU or an Elman RNN whose output is its hidden state → ONE native
  node, exactly as ``RNN(built-in cell)`` (``go_backwards`` = direction reverse, the sequence
  flipped back; probes ``<layer>/<direction>/…``);
- anything else → ONE ``Scan`` over the time axis whose body is the step (Keras's RNN loop:
  ``S_0 = initial state``, ``(y_t, S_t) = cell.call(x_t, S_{t−1})``), ``scan_input_directions =
  [1]`` under ``go_backwards``, so the scanned outputs come in Keras's (processing) order.

Initial states are ``initial_state`` when given, else zeros ``[batch, S_k]`` (Keras's default;
a cell with its own ``get_initial_state`` is refused without ``initial_state``). Outputs: the
last output or the sequence, then with ``return_state`` every final state. Probes of a Scan:
``hidden_sequence`` = the cell's outputs in input order ``[N, T, 1, H]``, ``hidden_final`` =
state 0, ``cell_final`` = state 1 (what the Keras runner's clone of the layer returns).
A mask, ``stateful`` or ``unroll`` with a custom cell is refused.
"""

from __future__ import annotations

import numpy as np
from onnx import helper

from seqgate.errors import Refusal
from seqgate.export.core.builder import FLOAT, GraphBuilder
from seqgate.export.core.cellmatch import NativeCell, match_step
from seqgate.export.core.rnn_nodes import RecurrentCall, emit_recurrent
from seqgate.export.core.scanbody import prefix_names
from seqgate.export.keras.call import KerasCall
from seqgate.export.keras.cellparts import check_options
from seqgate.export.keras.cellstep import Step, step_graph
from seqgate.export.keras.masking import mask_of
from seqgate.onnxfile.probes import Probe


def emit_custom_cell_rnn(b: GraphBuilder, call: KerasCall) -> list[str]:
    """RNN(custom cell): native node or Scan (module docstring)."""
    layer, cell = call.layer, call.layer.cell
    where = f"custom cell {type(cell).__name__} ({cell.name})"
    check_options(layer)
    if mask_of(call) is not None:
        raise Refusal(f"{where} called with a mask", "drop the mask or use a built-in cell")
    x = call.inputs[0]
    if x.rank != 3 or x.shape[2] is None:
        raise Refusal(f"{where}: input of rank {x.rank}, expected [batch, time, features] with fixed features")
    try:
        step = step_graph(cell, int(x.shape[2]), b.opset, call.name, call.table)
    except Refusal as r:
        raise Refusal(f"{where}: {r.what}", r.hint) from None
    init = _initial_states(b, call, step, where)
    native, why = match_step(step.graph, len(step.state_sizes))
    if native is not None and native.h_state == step.output_state:
        return _native(b, call, native, init)
    prefix_names(step.graph, f"{call.name}/step/")
    return _scan(b, call, step, init, why)


def _initial_states(b: GraphBuilder, call: KerasCall, step: Step, where: str) -> list[str]:
    given = call.kwargs.get("initial_state")
    if given is None and len(call.args) > 1:
        given = call.args[1]
    if given is not None:
        tensors = list(given) if isinstance(given, list | tuple) else [given]
        if len(tensors) != len(step.state_sizes):
            raise Refusal(f"initial_state has {len(tensors)} tensors, the cell {len(step.state_sizes)} states")
        return [call.value_of(t).name for t in tensors]
    if callable(getattr(call.layer.cell, "get_initial_state", None)):
        raise Refusal(f"{where} defines get_initial_state()", "pass initial_state explicitly")
    batch = b.slice(b.op("Shape", [call.inputs[0].name]), [0], [1], [0])
    zero = helper.make_tensor("zero", FLOAT, [1], [0.0])
    return [b.op("ConstantOfShape", [b.op("Concat", [batch, b.ints([s], "units")], axis=0)], value=zero)
            for s in step.state_sizes]


def _native(b: GraphBuilder, call: KerasCall, cell: NativeCell, init: list[str]) -> list[str]:
    layer = call.layer
    back = bool(layer.go_backwards)
    rc = RecurrentCall(kind=cell.kind, hidden=cell.hidden, direction="reverse" if back else "forward",
                       packed=cell.packed, activations=cell.activations, layer=call.name,
                       source={"framework": "keras", "layer": call.name, "go_backwards": back,
                               "return_sequences": bool(layer.return_sequences), "exported_as": cell.form})
    h0 = b.unsqueeze(init[cell.h_state], [0])
    c0 = b.unsqueeze(init[cell.c_state], [0]) if cell.c_state is not None else ""
    xt = b.transpose(call.inputs[0].name, [1, 0, 2])
    out = emit_recurrent(b, rc, xt, h0, c0, need_y=bool(layer.return_sequences), need_h=True,
                         need_c=bool(layer.return_state) and cell.kind == "lstm")
    h = b.squeeze(out.y_h, [0])
    results = [h]
    if layer.return_sequences:
        y = b.squeeze(out.y, [1])
        results = [b.transpose(b.reverse_time(y, 0) if back else y, [1, 0, 2])]
    if layer.return_state:
        finals = [""] * len(init)
        finals[cell.h_state] = h
        if cell.c_state is not None:
            finals[cell.c_state] = b.squeeze(out.y_c, [0])
        results.extend(finals)
    return results


def _scan(b: GraphBuilder, call: KerasCall, step: Step, init: list[str], why: str) -> list[str]:
    layer = call.layer
    back = bool(layer.go_backwards)
    finals = [b.fresh("state") for _ in init]
    seq = b.fresh("sequence")
    b.node("Scan", [*init, call.inputs[0].name], [*finals, seq], body=step.graph, num_scan_inputs=1,
           scan_input_axes=[1], scan_input_directions=[1 if back else 0], scan_output_axes=[1])
    _scan_probes(b, call, seq, finals, back, why)
    last = b.squeeze(b.slice(seq, [-1], [np.iinfo(np.int64).max], [1]), [1])
    results = [seq if layer.return_sequences else last]
    if layer.return_state:
        results.extend(finals)
    return results


def _scan_probes(b: GraphBuilder, call: KerasCall, seq: str, finals: list[str], back: bool, why: str) -> None:
    direction = "reverse" if back else "forward"
    src = {"framework": "keras", "layer": call.name, "go_backwards": back, "exported_as": "Scan",
           "not_native_because": why}
    in_order = b.reverse_time(seq, 1) if back else seq
    kinds = [("hidden_sequence", b.unsqueeze(in_order, [2]), "NTDH", b.last_node_name)]
    for kind, k in (("hidden_final", 0), ("cell_final", 1))[:len(finals)]:
        kinds.append((kind, b.unsqueeze(finals[k], [1]), "NDH", b.last_node_name))
    for kind, value, axes, node in kinds:
        b.probe(Probe(name=f"{call.name}/{direction}/{kind}", kind=kind, layer=call.name, direction=direction,
                      direction_index=0, node=node, output_index=0, value=value, axes=axes, source=src))
