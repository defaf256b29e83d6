"""Keras masks as ONNX values: the mask-building ops, the Masking layer, who may consume a mask.

Keras 3 records the mask computation of ``Masking`` (``any(not_equal(x, v), axis=-1)``) and of
``Embedding(mask_zero=True)`` (``not_equal(ids, 0)``), and the merging of masks, as operation
nodes of the Functional graph; a layer that takes a mask gets it as its ``mask=`` argument.
Masks are data: seqgate computes them in the graph from the inputs, exactly as Keras does, and
the layers that read them are exact for every mask pattern (see ``core.masked_steps``).

- ``MASK_OPS``: the operations a mask may be built with (``NotEqual``, ``Equal``, ``Any``,
  ``All``, ``LogicalAnd/Or/Not``, ``ExpandDims``, ``Squeeze``, ``Cast``); any other op on a
  mask path is refused.
- ``Masking``: ``y = where(any(x ≠ v, axis=−1, keepdims), x, 0)`` (keras ``Masking.call``).
- A layer that receives a mask must be in ``MASK_CONSUMERS`` (it reproduces Keras's use of
  the mask) or is refused: ignoring a mask would silently compute something else.
  ``BatchNormalization`` takes a mask only to compute batch moments in training; at inference
  it uses the moving statistics, so the mask does not change its output.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from seqgate.errors import Refusal, Unsupported
from seqgate.export.core.builder import GraphBuilder, np_to_onnx_type
from seqgate.export.keras.call import KV

BOOL = 9  # TensorProto.BOOL

MASK_CONSUMERS = frozenset({
    "SimpleRNN", "LSTM", "GRU", "RNN", "Bidirectional", "TimeDistributed",
    "GlobalAveragePooling1D", "BatchNormalization",
})


def mask_of(call: Any) -> KV | None:
    """The ONNX value of the ``mask=`` argument of a layer call (None when there is none)."""
    mask = call.kwargs.get("mask")
    if isinstance(mask, list | tuple):
        mask = next((m for m in mask if m is not None), None)
    return None if mask is None else call.value_of(mask)


def refuse_unhandled_mask(cls: str, call: Any) -> None:
    """Refuse a layer that receives a mask it would not apply as Keras does."""
    if cls not in MASK_CONSUMERS and mask_of(call) is not None:
        raise Refusal(f"a mask reaches {cls}, which seqgate cannot apply a mask to",
                      "layers that read a mask: SimpleRNN/LSTM/GRU/RNN, Bidirectional, "
                      "TimeDistributed, GlobalAveragePooling1D; drop the mask before this layer")


def _axes(op: Any, rank: int) -> list[int]:
    axis = op.axis
    axes = list(range(rank)) if axis is None else ([axis] if isinstance(axis, int) else list(axis))
    return sorted(a % rank for a in axes)


def _bool(b: GraphBuilder, v: KV) -> str:
    return v.name if v.dtype == "bool" else b.op("Cast", [v.name], to=BOOL)


def _reduce_bool(b: GraphBuilder, op: Any, x: KV, kind: str) -> str:
    # any = max over {0, 1}; all = min over {0, 1}
    as_int = b.op("Cast", [_bool(b, x)], to=np_to_onnx_type(np.int32))
    red = b.reduce("ReduceMax" if kind == "any" else "ReduceMin", as_int, _axes(op, x.rank),
                   keepdims=bool(op.keepdims))
    return b.op("Cast", [red], to=BOOL)


def _compare(b: GraphBuilder, node: Any, ins: list[KV], negate: bool) -> str:
    args = node.arguments.args
    if len(ins) == 2:
        other = ins[1].name
    elif len(ins) == 1 and len(args) == 2 and isinstance(args[1], int | float | bool | np.number):
        other = b.const(np.asarray(args[1], dtype=ins[0].dtype), "value")
    else:
        raise Refusal("a mask comparison seqgate does not recognise")
    eq = b.op("Equal", [ins[0].name, other])
    return b.op("Not", [eq]) if negate else eq


def _emit(b: GraphBuilder, node: Any, cls: str, ins: list[KV]) -> str:
    op = node.operation
    if cls in ("NotEqual", "Equal"):
        return _compare(b, node, ins, negate=cls == "NotEqual")
    if cls in ("Any", "All"):
        return _reduce_bool(b, op, ins[0], cls.lower())
    if cls in ("LogicalAnd", "LogicalOr"):
        return b.op("And" if cls == "LogicalAnd" else "Or", [_bool(b, ins[0]), _bool(b, ins[1])])
    if cls == "LogicalNot":
        return b.op("Not", [_bool(b, ins[0])])
    if cls == "ExpandDims":
        return b.unsqueeze(ins[0].name, [a % (ins[0].rank + 1) for a in np.atleast_1d(op.axis)])
    if cls == "Squeeze":
        return b.squeeze(ins[0].name, _axes(op, ins[0].rank))
    if cls == "Cast":
        return b.op("Cast", [ins[0].name], to=np_to_onnx_type(np.dtype(str(node.outputs[0].dtype))))
    raise Refusal(f"a mask is built with Keras operation {cls}",
                  "masks from Masking, Embedding(mask_zero=True) and merged masks are supported")


def emit_mask_op(b: GraphBuilder, node: Any, ins: list[KV], name: str,
                 problems: list[Unsupported]) -> list[str]:
    """ONNX values of one mask-building operation node; a refusal is collected in ``problems``."""
    cls = type(node.operation).__name__
    try:
        with b.layer(name, cls):
            return [_emit(b, node, cls, ins)]
    except Refusal as r:
        problems.append(Unsupported(f"{name} ({cls})", r.what, r.hint))
        return [b.fresh(f"{name}/unsupported_{i}") for i in range(len(node.outputs))]


def emit_masking(b: GraphBuilder, call: Any) -> list[str]:
    """The Masking layer's output (its mask is built by the op nodes Keras records)."""
    x = call.inputs[0]
    value = b.const(np.asarray(call.layer.mask_value, dtype=x.dtype), "mask_value")
    keep = _reduce_bool_last(b, b.op("Not", [b.op("Equal", [x.name, value])]))
    zero = b.const(np.zeros((), dtype=x.dtype), "zero")
    return [b.op("Where", [keep, x.name, zero])]


def _reduce_bool_last(b: GraphBuilder, x_bool: str) -> str:
    as_int = b.op("Cast", [x_bool], to=np_to_onnx_type(np.int32))
    return b.op("Cast", [b.reduce("ReduceMax", as_int, [-1], keepdims=True)], to=BOOL)


PADDING_KEY = "seqgate.padding"
ALL_PATTERNS = ["right", "left", "holes"]


def padding_metadata(graph: Any) -> dict[str, str]:
    """``seqgate.padding``: graph inputs whose padded steps make a mask, for verify's padded sets.

    An entry ``{"kind": "value", "input": NAME, "value": V, "patterns": [...]}`` says a step of
    input NAME whose features all equal V (Masking) or whose id is V (Embedding mask_zero) is
    padding; every pattern is exact (``core.masked_steps``), so right, left and holes are listed.
    """
    import json

    from seqgate.sources.keras_graph import graph_nodes

    inputs = {id(t): t.name for t in graph.inputs}
    entries = []
    for node, layer in graph_nodes(graph):
        cls = type(layer).__name__
        src = node.input_tensors[0] if node.input_tensors else None
        if src is None or id(src) not in inputs:
            continue
        if cls == "Masking":
            value = float(layer.mask_value)
        elif cls == "Embedding" and getattr(layer, "mask_zero", False):
            value = 0
        else:
            continue
        entries.append({"kind": "value", "input": inputs[id(src)], "value": value, "patterns": ALL_PATTERNS,
                        "min_length": 0})
    return {PADDING_KEY: json.dumps(entries, sort_keys=True)} if entries else {}
