"""Keras recurrent layers called with a mask: one native node over the compacted valid steps.

Semantics reproduced (Keras masked RNN loop, ``keras.src.backend.tensorflow.rnn``):
a masked step keeps the state; the output at a masked step is the previous output (zeros
before the first valid step), or zeros when ``zero_output_for_mask=True`` (``Bidirectional``
forces it to ``return_sequences`` on both sublayers); ``last_output`` (what a layer without
``return_sequences`` returns) is the output at the last processed step under that rule; the
returned states are the state after the last valid step, or the initial state when a row has
no valid step. ``go_backwards`` processes the steps from the end and returns the sequence in
reversed order. How any mask pattern maps onto ONNX ``sequence_lens``: ``core.masked_steps``.

Probes: ``hidden_sequence`` (only when the layer returns sequences) is the per-position
output under the sublayer's own rule, ``[N, T, 1, H]`` in input order; finals are the states.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from seqgate.export.core.builder import GraphBuilder, Value
from seqgate.export.core.masked_steps import (
    StepOrder,
    compact,
    expand,
    keep_initial,
    last_step_valid,
    step_order,
)
from seqgate.export.core.rnn_nodes import (
    ProbeSlot,
    RecurrentCall,
    RecurrentOut,
    emit_recurrent,
    register_probe_slots,
)


@dataclass(frozen=True)
class MaskedRun:
    """The node's outputs plus the states with Keras's rule for rows without a valid step."""

    order: StepOrder
    out: RecurrentOut
    h: ProbeSlot  # [D, N, H]
    c: ProbeSlot | None


def run_masked(b: GraphBuilder, rc: RecurrentCall, x_ntf: str, mask: Value, h0: str, c0: str,
               need_y: bool) -> MaskedRun:
    """Compact the valid steps, run the node with ``sequence_lens``, fix empty rows' states."""
    order = step_order(b, mask.name)
    xt = b.transpose(compact(b, x_ntf, order), [1, 0, 2])
    return run_compacted(b, rc, xt, order, h0, c0, need_y)


def run_compacted(b: GraphBuilder, rc: RecurrentCall, xt: str, order: StepOrder, h0: str, c0: str,
                  need_y: bool) -> MaskedRun:
    """:func:`run_masked` on steps already compacted by ``order``, time-major ``[T, N, I]``.

    A stack of cells (``stacked``) compacts once: a node's compacted ``Y`` (zero past
    ``count``, which the next node's ``sequence_lens`` never reads) is the next node's input."""
    lstm = rc.kind == "lstm"
    out = emit_recurrent(b, rc, xt, h0, c0, need_y=need_y, need_h=True, need_c=lstm,
                         sequence_lens=order.count_i32, probes=False)
    h = ProbeSlot(out.node, 1, out.y_h, "DNH")
    if h0:
        value = keep_initial(b, out.y_h, h0, order)
        h = ProbeSlot(b.last_node_name, 0, value, "DNH")
    c = ProbeSlot(out.node, 2, out.y_c, "DNH") if lstm else None
    if lstm and c0:
        value = keep_initial(b, out.y_c, c0, order)
        c = ProbeSlot(b.last_node_name, 0, value, "DNH")
    return MaskedRun(order, out, h, c)


def _pick(b: GraphBuilder, x: str, index: int, axis: int) -> str:
    return b.op("Gather", [x, b.const(np.asarray(index, np.int64), "index")], axis=axis)


def sequence_at_positions(b: GraphBuilder, run: MaskedRun, d: int, reverse: bool,
                          zero_masked: bool) -> tuple[str, ProbeSlot]:
    """Direction d's outputs ``[N, T, H]`` at their input positions, and its probe slot."""
    y = run.out.y  # [T, D, N, H], compacted
    y_d = b.transpose(_pick(b, y, d, 1), [1, 0, 2])
    seq = expand(b, y_d, run.order, reverse=reverse, zero_masked=zero_masked)
    probe = b.unsqueeze(seq, [2])
    return seq, ProbeSlot(b.last_node_name, 0, probe, "NTDH")


def last_output(b: GraphBuilder, run: MaskedRun, d: int, reverse: bool, zero_masked: bool) -> str:
    """``last_output`` of direction d ``[N, H]`` (ONNX Y_h is zero for rows without valid steps)."""
    h = _pick(b, run.out.y_h, d, 0)
    if not zero_masked:
        return h
    valid = b.unsqueeze(last_step_valid(b, run.order, reverse), [1])
    return b.op("Where", [valid, h, b.const(np.zeros((), np.float32), "zero")])


def state_of(b: GraphBuilder, slot: ProbeSlot, d: int) -> str:
    """Direction d's state ``[N, H]`` from a ``[D, N, H]`` slot."""
    return _pick(b, slot.value, d, 0)


def register(b: GraphBuilder, rc: RecurrentCall, run: MaskedRun, seq_slots: list[ProbeSlot] | None) -> None:
    """Probes of a masked run: sequences (when computed) and the states of each direction."""
    slots = []
    for d in range(2 if rc.direction == "bidirectional" else 1):
        one: dict[str, ProbeSlot] = {}
        if seq_slots is not None:
            one["hidden_sequence"] = seq_slots[d]
        one["hidden_final"] = ProbeSlot(run.h.node, run.h.output_index, run.h.value, "DNH", d)
        if run.c is not None:
            one["cell_final"] = ProbeSlot(run.c.node, run.c.output_index, run.c.value, "DNH", d)
        slots.append(one)
    register_probe_slots(b, rc, slots)
