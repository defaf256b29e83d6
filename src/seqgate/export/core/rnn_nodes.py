"""Emit one native ONNX RNN/GRU/LSTM node with its probes (shared by Keras and PyTorch capture).

The node runs in ``layout=0`` (onnxruntime refuses ``layout=1``): X ``[T, N, I]`` → Y
``[T, D, N, H]``, Y_h / Y_c ``[D, N, H]``. Outputs the model does not use are left empty in the
deployable graph; the probe map still names them (see ``seqgate.probes``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from seqgate.export.core.builder import GraphBuilder
from seqgate.export.core.recurrent import ONNX_OP, CellActivation, Packed, activation_attrs
from seqgate.onnxfile.probes import Probe

DIRECTION_NAMES = {"forward": ["forward"], "reverse": ["reverse"], "bidirectional": ["forward", "reverse"]}


@dataclass
class RecurrentCall:
    """Everything needed to emit one recurrent op."""

    kind: str  # "rnn" | "gru" | "lstm"
    hidden: int
    direction: str  # "forward" | "reverse" | "bidirectional"
    packed: Packed
    activations: list[CellActivation]  # all directions' slots, forward first
    layer: str  # source layer name, used for probe names
    stack_index: int = 0
    probe_prefix: str = ""  # defaults to layer
    direction_labels: list[str] | None = None  # overrides forward/reverse in probe names
    source: dict[str, Any] = field(default_factory=dict)
    per_direction_source: list[dict[str, Any]] | None = None
    clip: float | None = None


@dataclass(frozen=True)
class RecurrentOut:
    """Value names of the op's outputs; "" where the graph does not compute that output."""

    y: str
    y_h: str
    y_c: str
    node: str


def emit_recurrent(
    b: GraphBuilder,
    call: RecurrentCall,
    x_tni: str,
    initial_h: str = "",
    initial_c: str = "",
    need_y: bool = False,
    need_h: bool = False,
    need_c: bool = False,
    sequence_lens: str = "",
    probes: bool = True,
) -> RecurrentOut:
    """Emit the node over time-major ``x_tni``; register hidden_sequence/final (and cell) probes.

    ``sequence_lens`` (int32 ``[N]``, ONNX spec): row n runs over its first ``len[n]`` steps;
    Y is zero for t ≥ len, Y_h/Y_c hold the state after the last valid step (zero for len 0).
    ``probes=False`` leaves the probes to the caller (:func:`register_probe_slots`), for
    callers whose states live in values computed after the node (masked steps moved back).
    """
    p = call.packed
    w = b.const(p.W, "W")
    r = b.const(p.R, "R")
    bias = b.const(p.B, "B") if p.B is not None else ""
    inputs = [x_tni, w, r, bias, sequence_lens, initial_h]
    if call.kind == "lstm":
        inputs.append(initial_c)
        if p.P is not None:
            inputs.append(b.const(p.P, "P"))
    names = {"y": b.fresh("Y"), "y_h": b.fresh("Y_h"), "y_c": b.fresh("Y_c") if call.kind == "lstm" else ""}
    outs = [names["y"] if need_y else "", names["y_h"] if need_h else ""]
    if call.kind == "lstm":
        outs.append(names["y_c"] if need_c else "")
    attrs: dict[str, Any] = {"hidden_size": call.hidden, "direction": call.direction}
    attrs.update(activation_attrs(call.activations))
    if call.kind == "gru":
        attrs["linear_before_reset"] = p.linear_before_reset
    if call.clip is not None:
        attrs["clip"] = float(call.clip)
    # An op with every output unused would be pruned by runtimes; keep at least Y_h.
    if not any(outs):
        outs[1] = names["y_h"]
    b.node(ONNX_OP[call.kind], inputs, outs, **attrs)
    node = b.last_node_name
    if probes:
        _register_probes(b, call, node, names)
    return RecurrentOut(
        y=names["y"] if need_y else "",
        y_h=outs[1],
        y_c=outs[2] if call.kind == "lstm" else "",
        node=node,
    )


def _register_probes(b: GraphBuilder, call: RecurrentCall, node: str, names: dict[str, str]) -> None:
    labels = call.direction_labels or DIRECTION_NAMES[call.direction]
    prefix = call.probe_prefix or call.layer
    kinds = [("hidden_sequence", 0, "y", "TDNH"), ("hidden_final", 1, "y_h", "DNH")]
    if call.kind == "lstm":
        kinds.append(("cell_final", 2, "y_c", "DNH"))
    for d, label in enumerate(labels):
        src = dict(call.source)
        if call.per_direction_source:
            src.update(call.per_direction_source[d])
        for kind, index, key, axes in kinds:
            b.probe(
                Probe(
                    name=f"{prefix}/{label}/{kind}",
                    kind=kind,
                    layer=call.layer,
                    direction=label,
                    direction_index=d,
                    node=node,
                    output_index=index,
                    value=names[key],
                    axes=axes,
                    stack_index=call.stack_index,
                    source=src,
                )
            )


@dataclass(frozen=True)
class ProbeSlot:
    """Where one probe's tensor lives: a node output of the given axes (``NTDH``, ``DNH``…)."""

    node: str
    output_index: int
    value: str
    axes: str
    direction_index: int = 0


def register_probe_slots(b: GraphBuilder, call: RecurrentCall, slots: list[dict[str, ProbeSlot]]) -> None:
    """Register probes of ``call`` from explicit slots: ``slots[d][kind]`` for direction d."""
    labels = call.direction_labels or DIRECTION_NAMES[call.direction]
    prefix = call.probe_prefix or call.layer
    for d, label in enumerate(labels):
        src = dict(call.source)
        if call.per_direction_source:
            src.update(call.per_direction_source[d])
        for kind in ("hidden_sequence", "hidden_final", "cell_final"):
            slot = slots[d].get(kind)
            if slot is None:
                continue
            b.probe(Probe(name=f"{prefix}/{label}/{kind}", kind=kind, layer=call.layer, direction=label,
                          direction_index=slot.direction_index, node=slot.node,
                          output_index=slot.output_index, value=slot.value, axes=slot.axes,
                          stack_index=call.stack_index, source=src))
