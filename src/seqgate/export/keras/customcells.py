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

A mask (``Masking``, ``Embedding(mask_zero=True)``, ``mask=``) follows Keras's masked loop (a
masked step keeps every state; the output repeats the previous one, zeros before the first valid
step, or is zero with ``zero_output_for_mask``): the native node exactly as a masked built-in
layer (``masked_recurrent``: valid steps compacted, ``sequence_lens``, moved back), the Scan
with the mask scanned beside the input and applied inside the body (``core.masked_scan``).

Initial states are ``initial_state`` when given, else zeros ``[batch, S_k]`` (Keras's default;
a cell with its own ``get_initial_state`` is refused without ``initial_state``). Outputs: the
last output or the sequence, then with ``return_state`` every final state. Probes of a Scan:
``hidden_sequence`` = the cell's outputs in input order ``[N, T, 1, H]``, ``hidden_final`` =
state 0, ``cell_final`` = state 1 (what the Keras runner's clone of the layer returns).
"""

from __future__ import annotations

import numpy as np
from onnx import helper

from seqgate.errors import Refusal
from seqgate.export.core.builder import FLOAT, GraphBuilder, Value
from seqgate.export.core.cellmatch import NativeCell, match_step
from seqgate.export.core.masked_scan import mask_scan_body
from seqgate.export.core.rnn_nodes import RecurrentCall, emit_recurrent
from seqgate.export.core.scanbody import prefix_names
from seqgate.export.keras import masked_recurrent as masked
from seqgate.export.keras.call import KerasCall
from seqgate.export.keras.cellparts import check_options, stateful_mark
from seqgate.export.keras.cellstep import Step, step_graph
from seqgate.export.keras.masking import BOOL, mask_of
from seqgate.onnxfile.probes import Probe


def emit_custom_cell_rnn(b: GraphBuilder, call: KerasCall) -> list[str]:
    """RNN(custom cell): native node or Scan (module docstring)."""
    layer, cell = call.layer, call.layer.cell
    where = f"custom cell {type(cell).__name__} ({cell.name})"
    check_options(layer)
    x = call.inputs[0]
    if x.rank != 3 or x.shape[2] is None:
        raise Refusal(f"{where}: input of rank {x.rank}, expected [batch, time, features] with fixed features")
    try:
        step = step_graph(cell, int(x.shape[2]), b.opset, call.name, call.table)
    except Refusal as r:
        raise Refusal(f"{where}: {r.what}", r.hint) from None
    init = _initial_states(b, call, step, where)
    native, why = match_step(step.graph, len(step.state_sizes))
    mask = mask_of(call)
    if native is not None and native.h_state == step.output_state:
        if mask is not None:
            return _masked_native(b, call, native, init, mask)
        return _native(b, call, native, init)
    prefix_names(step.graph, f"{call.name}/step/")
    if mask is not None:
        mask_scan_body(step.graph, len(init), bool(layer.zero_output_for_mask), f"{call.name}/step/")
        return _scan(b, call, step, init, why, _masked_scan_inputs(b, call, step, mask))
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


def _native_call(call: KerasCall, cell: NativeCell) -> RecurrentCall:
    layer = call.layer
    back = bool(layer.go_backwards)
    return RecurrentCall(kind=cell.kind, hidden=cell.hidden, direction="reverse" if back else "forward",
                         packed=cell.packed, activations=cell.activations, layer=call.name,
                         source={"framework": "keras", "layer": call.name, "go_backwards": back,
                                 "return_sequences": bool(layer.return_sequences), "exported_as": cell.form,
                                 **stateful_mark(layer)})


def _native(b: GraphBuilder, call: KerasCall, cell: NativeCell, init: list[str]) -> list[str]:
    layer = call.layer
    back = bool(layer.go_backwards)
    rc = _native_call(call, cell)
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


def _masked_native(b: GraphBuilder, call: KerasCall, cell: NativeCell, init: list[str],
                   mask: Value) -> list[str]:
    """The proven native node under a mask, as a masked built-in layer (``masked_recurrent``)."""
    layer = call.layer
    back, zero = bool(layer.go_backwards), bool(layer.zero_output_for_mask)
    rc = _native_call(call, cell)
    h0 = b.unsqueeze(init[cell.h_state], [0])
    c0 = b.unsqueeze(init[cell.c_state], [0]) if cell.c_state is not None else ""
    run = masked.run_masked(b, rc, call.inputs[0].name, mask, h0, c0, need_y=bool(layer.return_sequences))
    seq_slots = None
    if layer.return_sequences:
        seq, slot = masked.sequence_at_positions(b, run, 0, reverse=back, zero_masked=zero)
        seq_slots = [slot]
        results = [b.reverse_time(seq, 1) if back else seq]
    else:
        results = [masked.last_output(b, run, 0, reverse=back, zero_masked=zero)]
    masked.register(b, rc, run, seq_slots)
    if layer.return_state:
        finals = [""] * len(init)
        finals[cell.h_state] = masked.state_of(b, run.h, 0)
        if cell.c_state is not None and run.c is not None:
            finals[cell.c_state] = masked.state_of(b, run.c, 0)
        results.extend(finals)
    return results


def _masked_scan_inputs(b: GraphBuilder, call: KerasCall, step: Step, mask: Value) -> tuple[str, str]:
    """(zeros ``[N, output]`` for the carried previous output, the mask as bool ``[N, T]``)."""
    batch = b.slice(b.op("Shape", [call.inputs[0].name]), [0], [1], [0])
    zero = helper.make_tensor("zero", FLOAT, [1], [0.0])
    prev = b.op("ConstantOfShape", [b.op("Concat", [batch, b.ints([step.output_size], "units")], axis=0)],
                value=zero)
    return prev, b.op("Cast", [mask.name], to=BOOL)


def _scan(b: GraphBuilder, call: KerasCall, step: Step, init: list[str], why: str,
          masked_inputs: tuple[str, str] | None = None) -> list[str]:
    """One Scan over the step; with ``masked_inputs`` the body is ``core.masked_scan``'s."""
    layer = call.layer
    back = bool(layer.go_backwards)
    finals = [b.fresh("state") for _ in init]
    seq = b.fresh("sequence")
    carried, scanned, outs = list(init), [call.inputs[0].name], [*finals, seq]
    if masked_inputs is not None:
        carried.append(masked_inputs[0])
        scanned.append(masked_inputs[1])
        outs = [*finals, b.fresh("last_output"), seq]
    b.node("Scan", [*carried, *scanned], outs, body=step.graph, num_scan_inputs=len(scanned),
           scan_input_axes=[1] * len(scanned), scan_input_directions=[1 if back else 0] * len(scanned),
           scan_output_axes=[1])
    _scan_probes(b, call, seq, finals, back, why)
    last = b.squeeze(b.slice(seq, [-1], [np.iinfo(np.int64).max], [1]), [1])
    results = [seq if layer.return_sequences else last]
    if layer.return_state:
        results.extend(finals)
    return results


def _scan_probes(b: GraphBuilder, call: KerasCall, seq: str, finals: list[str], back: bool, why: str) -> None:
    direction = "reverse" if back else "forward"
    src = {"framework": "keras", "layer": call.name, "go_backwards": back, "exported_as": "Scan",
           "not_native_because": why, **stateful_mark(call.layer)}
    in_order = b.reverse_time(seq, 1) if back else seq
    kinds = [("hidden_sequence", b.unsqueeze(in_order, [2]), "NTDH", b.last_node_name)]
    for kind, k in (("hidden_final", 0), ("cell_final", 1))[:len(finals)]:
        kinds.append((kind, b.unsqueeze(finals[k], [1]), "NDH", b.last_node_name))
    for kind, value, axes, node in kinds:
        b.probe(Probe(name=f"{call.name}/{direction}/{kind}", kind=kind, layer=call.name, direction=direction,
                      direction_index=0, node=node, output_index=0, value=value, axes=axes, source=src))
