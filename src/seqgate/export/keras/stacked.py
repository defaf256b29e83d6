"""Keras ``RNN([cell, cell, …])`` (a ``StackedRNNCells``) → one native ONNX node per cell.

Equation (Keras ``StackedRNNCells.call``): at every step t, cell k reads cell k−1's output of
the same step and its own state of step t−1; the layer's output is the last cell's output.
Each cell's state depends only on the outputs of the cell below at steps ≤ t, so running the
stack step by step equals running cell 0 over the whole sequence, then cell 1 over cell 0's
outputs, and so on: one ONNX node per cell, chained through ``Y``.

Options, as for ``RNN(cell)`` (``recurrent``): ``return_sequences``, ``return_state`` (the
states follow per cell, ``h[, c]`` for cell 0, then cell 1 …, as Keras returns them),
``go_backwards`` (every node runs ``direction="reverse"``; a reverse node's ``Y`` is in input
order, so the next reverse node reads it as Keras's cells read their input; the returned
sequence is flipped), ``initial_state`` (a flat or per-cell nested list, per cell ``h[, c]``).
A mask is refused (not exported for stacks yet).

Probes: ``<layer>/cell<k>/<direction>/…`` with ``stack_index = k`` and ``source["cell_index"]``.
"""

from __future__ import annotations

from typing import Any

from seqgate.errors import Refusal
from seqgate.export.core.builder import GraphBuilder
from seqgate.export.core.rnn_nodes import RecurrentCall, emit_recurrent
from seqgate.export.keras.call import KerasCall
from seqgate.export.keras.cellparts import builtin_cell, cell_slots, check_options, pack_cell
from seqgate.export.keras.masking import mask_of


def _flat(x: Any) -> list[Any]:
    if isinstance(x, list | tuple):
        return [leaf for item in x for leaf in _flat(item)]
    return [] if x is None else [x]


def _initial_states(b: GraphBuilder, call: KerasCall, kinds: list[str]) -> list[tuple[str, str]]:
    """Per cell (initial_h [1, N, H], initial_c) from Keras's ``initial_state`` ("" when absent)."""
    init = call.kwargs.get("initial_state")
    if init is None and len(call.args) > 1:
        init = call.args[1]
    tensors = _flat(init)
    if not tensors:
        return [("", "")] * len(kinds)
    need = sum(2 if k == "lstm" else 1 for k in kinds)
    if len(tensors) != need:
        raise Refusal(f"initial_state has {len(tensors)} tensors, the cells of the stack need {need}")
    out: list[tuple[str, str]] = []
    at = 0
    for kind in kinds:
        h = b.unsqueeze(call.value_of(tensors[at]).name, [0])
        c = b.unsqueeze(call.value_of(tensors[at + 1]).name, [0]) if kind == "lstm" else ""
        at += 2 if kind == "lstm" else 1
        out.append((h, c))
    return out


def emit_stacked_rnn(b: GraphBuilder, call: KerasCall) -> list[str]:
    """RNN(StackedRNNCells) with the options of the module docstring."""
    layer = call.layer
    check_options(layer)
    if mask_of(call) is not None:
        raise Refusal("RNN over a list of cells called with a mask",
                      "use one RNN layer per cell (masks are exported for those), or drop the mask")
    cells = [builtin_cell(c, f"{call.name} cell {k}") for k, c in enumerate(layer.cell.cells)]
    x = call.inputs[0]
    if x.rank != 3:
        raise Refusal(f"input of rank {x.rank}, expected [batch, time, features]")
    back = bool(layer.go_backwards)
    seqs, state = bool(layer.return_sequences), bool(layer.return_state)
    inits = _initial_states(b, call, [k for k, _ in cells])
    cur = b.transpose(x.name, [1, 0, 2])  # [T, N, I]
    finals: list[str] = []
    last_y = ""
    for k, ((kind, cell), (h0, c0)) in enumerate(zip(cells, inits, strict=True)):
        top = k == len(cells) - 1
        rc = RecurrentCall(
            kind=kind, hidden=int(cell.units), direction="reverse" if back else "forward",
            packed=pack_cell(kind, cell), activations=cell_slots(kind, cell), layer=call.name,
            stack_index=k, probe_prefix=f"{call.name}/cell{k}",
            source={"framework": "keras", "layer": call.name, "cell_index": k, "cell": cell.name,
                    "go_backwards": back, "return_sequences": seqs},
        )
        out = emit_recurrent(b, rc, cur, h0, c0, need_y=not top or seqs, need_h=True,
                             need_c=state and kind == "lstm")
        if not top:
            cur = b.squeeze(out.y, [1])  # [T, N, H_k]: the next cell's input
        last_y = out.y
        finals.append(b.squeeze(out.y_h, [0]))
        if state and kind == "lstm":
            finals.append(b.squeeze(out.y_c, [0]))
    results: list[str] = []
    if seqs:
        y = b.squeeze(last_y, [1])
        if back:
            y = b.reverse_time(y, 0)
        results.append(b.transpose(y, [1, 0, 2]))
    else:
        top_h = finals[-2] if state and cells[-1][0] == "lstm" else finals[-1]
        results.append(top_h)
    if state:
        results.extend(finals)
    return results
