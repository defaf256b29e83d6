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

A mask (``Masking``, ``Embedding(mask_zero=True)``, ``mask=``) follows Keras's masked loop for
stacks: at a masked step every cell's state is kept and the layer's output repeats the previous
output (zeros with ``zero_output_for_mask``). Cell k's state still changes only at valid steps,
from cell k−1's outputs at valid steps, so the per-cell form holds over the valid steps alone:
the valid steps are compacted ONCE (``core.masked_steps``), every node runs on the compacted
steps with ``sequence_lens`` and reads the compacted ``Y`` of the node below, and the top
node's outputs are moved back to their positions with Keras's fill rule
(``masked_recurrent``). Any mask pattern is exact; a row without valid steps keeps its
initial states.

Probes: ``<layer>/cell<k>/<direction>/…`` with ``stack_index = k`` and ``source["cell_index"]``;
with a mask, every cell's ``hidden_sequence`` is its output at each position under the layer's
fill rule (what the Keras runner's per-cell clones return), the top cell's only when the layer
returns sequences.
"""

from __future__ import annotations

from typing import Any

from seqgate.errors import Refusal
from seqgate.export.core.builder import GraphBuilder, Value
from seqgate.export.core.masked_steps import compact, step_order
from seqgate.export.core.rnn_nodes import RecurrentCall, emit_recurrent
from seqgate.export.keras import masked_recurrent as masked
from seqgate.export.keras.call import KerasCall
from seqgate.export.keras.cellparts import builtin_cell, cell_slots, check_options, pack_cell, stateful_mark
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


def _calls(call: KerasCall, cells: list[tuple[str, Any]]) -> list[RecurrentCall]:
    layer = call.layer
    back, seqs = bool(layer.go_backwards), bool(layer.return_sequences)
    return [RecurrentCall(
        kind=kind, hidden=int(cell.units), direction="reverse" if back else "forward",
        packed=pack_cell(kind, cell), activations=cell_slots(kind, cell), layer=call.name,
        stack_index=k, probe_prefix=f"{call.name}/cell{k}",
        source={"framework": "keras", "layer": call.name, "cell_index": k, "cell": cell.name,
                "go_backwards": back, "return_sequences": seqs, **stateful_mark(layer)},
    ) for k, (kind, cell) in enumerate(cells)]


def emit_stacked_rnn(b: GraphBuilder, call: KerasCall) -> list[str]:
    """RNN(StackedRNNCells) with the options of the module docstring."""
    layer = call.layer
    check_options(layer)
    cells = [builtin_cell(c, f"{call.name} cell {k}") for k, c in enumerate(layer.cell.cells)]
    x = call.inputs[0]
    if x.rank != 3:
        raise Refusal(f"input of rank {x.rank}, expected [batch, time, features]")
    back = bool(layer.go_backwards)
    seqs, state = bool(layer.return_sequences), bool(layer.return_state)
    inits = _initial_states(b, call, [k for k, _ in cells])
    rcs = _calls(call, cells)
    mask = mask_of(call)
    if mask is not None:
        return _masked_stack(b, rcs, x.name, mask, inits, (seqs, state, bool(layer.zero_output_for_mask)))
    cur = b.transpose(x.name, [1, 0, 2])  # [T, N, I]
    finals: list[str] = []
    last_y = ""
    for k, (rc, (h0, c0)) in enumerate(zip(rcs, inits, strict=True)):
        top = k == len(rcs) - 1
        out = emit_recurrent(b, rc, cur, h0, c0, need_y=not top or seqs, need_h=True,
                             need_c=state and rc.kind == "lstm")
        if not top:
            cur = b.squeeze(out.y, [1])  # [T, N, H_k]: the next cell's input
        last_y = out.y
        finals.append(b.squeeze(out.y_h, [0]))
        if state and rc.kind == "lstm":
            finals.append(b.squeeze(out.y_c, [0]))
    results: list[str] = []
    if seqs:
        y = b.squeeze(last_y, [1])
        if back:
            y = b.reverse_time(y, 0)
        results.append(b.transpose(y, [1, 0, 2]))
    else:
        top_h = finals[-2] if state and rcs[-1].kind == "lstm" else finals[-1]
        results.append(top_h)
    if state:
        results.extend(finals)
    return results


def _masked_stack(b: GraphBuilder, rcs: list[RecurrentCall], x: str, mask: Value,
                  inits: list[tuple[str, str]], flags: tuple[bool, bool, bool]) -> list[str]:
    """The masked stack of the module docstring; ``flags`` = (return_sequences, return_state,
    zero_output_for_mask)."""
    seqs, state, zero = flags
    back = rcs[0].direction == "reverse"
    order = step_order(b, mask.name)
    cur = b.transpose(compact(b, x, order), [1, 0, 2])  # [T, N, I], valid steps first
    finals: list[str] = []
    result = ""
    for k, (rc, (h0, c0)) in enumerate(zip(rcs, inits, strict=True)):
        top = k == len(rcs) - 1
        run = masked.run_compacted(b, rc, cur, order, h0, c0, need_y=not top or seqs)
        seq_slots = None
        if not top or seqs:
            seq, slot = masked.sequence_at_positions(b, run, 0, reverse=back, zero_masked=zero)
            seq_slots = [slot]
        if not top:
            cur = b.squeeze(run.out.y, [1])  # compacted [T, N, H_k]: the next cell's input
        elif seqs:
            result = b.reverse_time(seq, 1) if back else seq
        else:
            result = masked.last_output(b, run, 0, reverse=back, zero_masked=zero)
        masked.register(b, rc, run, seq_slots)
        finals.append(masked.state_of(b, run.h, 0))
        if run.c is not None:
            finals.append(masked.state_of(b, run.c, 0))
    return [result, *finals] if state else [result]
