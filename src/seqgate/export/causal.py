"""Which values of an ONNX graph carry a time axis, and whether step t uses only steps ≤ t.

A streaming file is exact only if the graph is *causal*: every output step t depends on input
steps 0..t alone (plus carried recurrent state). :func:`time_kinds` proves that by walking the
graph once in node order and giving every value a kind:

- ``Step(axis)``: a per-step value whose time axis is ``axis``, counted from the end (so
  broadcasting, which aligns shapes on the right, keeps it); step t depends on steps ≤ t;
- ``LATEST``: a value with no time axis that summarises the window up to its last step (a
  recurrent node's final state, ``x[:, -1]``); fed a prefix, it is the prefix's summary;
- ``None``: no dependence on a time-indexed value (weights, shapes, static inputs).

Sequence inputs are graph inputs of rank ≥ 3, or rank 2 integer ids (``[batch, time]``); their
time axis is 1. Each operator has a rule; an operator with a rule that fails, or with no rule,
on a time-indexed value is refused with a :class:`NotCausal` naming the node's source layer
(its ``doc_string``) and why. The rules are deliberately conservative: a refusal is cheap, an
inexact stream is not. Refused, e.g.: a reduction, softmax, pooling or convolution over time,
a recurrent node running backward or with ``sequence_lens`` (masking), a slice of other steps
than the latest, a per-step value combined with a summary (attention over the window).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import onnx
from onnx import helper, numpy_helper


@dataclass(frozen=True)
class Step:
    """A per-step value; ``axis`` < 0 is the time axis counted from the end."""

    axis: int


LATEST = "latest"
Kind = Step | str | None
RECURRENT_OPS = ("RNN", "GRU", "LSTM")
ELEMENTWISE = frozenset(
    "Add Sub Mul Div Pow Max Min Sum Mean Where Relu Tanh Sigmoid Exp Log Neg Abs Sqrt Reciprocal Erf "
    "Clip LeakyRelu Elu Selu Celu Softplus Softsign HardSigmoid HardSwish Gelu Mish PRelu ThresholdedRelu "
    "Cast Identity Dropout Floor Ceil Round Sign Sin Cos Equal Greater Less GreaterOrEqual LessOrEqual "
    "Not And Or Xor IsNaN IsInf BatchNormalization".split())
INT64_BIG = 2**62


class NotCausal(Exception):
    """A node that breaks streaming: ``where`` is its source layer, ``why`` the reason."""

    def __init__(self, where: str, why: str) -> None:
        super().__init__(f"{where}: {why}")
        self.where, self.why = where, why


def layer_of(node: onnx.NodeProto) -> str:
    """The source layer a node came from, as the builder wrote it in ``doc_string``."""
    doc = node.doc_string
    if "layer '" in doc:
        name = doc.split("layer '", 1)[1].split("'", 1)[0]
        kind = doc.rsplit("(", 1)[-1].rstrip(")") if doc.endswith(")") else ""
        return f"{name} ({kind})" if kind else name
    return f"node {node.name} ({node.op_type})"


def sequence_inputs(model: onnx.ModelProto) -> dict[str, int]:
    """Graph inputs with a time axis → that axis (1); see the module docstring."""
    out = {}
    inits = {i.name for i in model.graph.initializer}
    for vi in model.graph.input:
        if vi.name in inits or not vi.type.HasField("tensor_type"):
            continue
        rank = len(vi.type.tensor_type.shape.dim)
        integer = vi.type.tensor_type.elem_type in (onnx.TensorProto.INT32, onnx.TensorProto.INT64)
        if rank >= 3 or (rank == 2 and integer):
            out[vi.name] = 1
    return out


class _Graph:
    """Constants and ranks of the values of one graph (shape inference)."""

    def __init__(self, model: onnx.ModelProto) -> None:
        inferred = onnx.shape_inference.infer_shapes(model)
        g = inferred.graph
        self.consts = {i.name: numpy_helper.to_array(i) for i in g.initializer}
        for n in g.node:
            if n.op_type == "Constant" and n.attribute and n.attribute[0].name == "value":
                self.consts[n.output[0]] = numpy_helper.to_array(n.attribute[0].t)
        self.dims: dict[str, list[Any]] = {}
        for vi in [*g.input, *g.value_info, *g.output]:
            if vi.type.HasField("tensor_type") and vi.type.tensor_type.HasField("shape"):
                self.dims[vi.name] = [d.dim_value if d.HasField("dim_value") else (d.dim_param or None)
                                      for d in vi.type.tensor_type.shape.dim]

    def rank(self, name: str) -> int | None:
        d = self.dims.get(name)
        return None if d is None else len(d)

    def ints(self, node: onnx.NodeProto, index: int, attr: str) -> list[int] | None:
        """An int list given as input ``index`` (a constant) or, in older opsets, as attribute ``attr``."""
        if len(node.input) > index and node.input[index]:
            c = self.consts.get(node.input[index])
            return None if c is None else [int(v) for v in np.ravel(c)]
        for a in node.attribute:
            if a.name == attr:
                return [int(v) for v in a.ints]
        return None


def _attr(node: onnx.NodeProto, name: str, default: Any) -> Any:
    for a in node.attribute:
        if a.name == name:
            return helper.get_attribute_value(a)
    return default


def _neg(axis: int, rank: int) -> int:
    return axis - rank if axis >= 0 else axis


def time_kinds(model: onnx.ModelProto) -> dict[str, Kind]:
    """The kind of every value (module docstring); raises :class:`NotCausal` at the first bad node."""
    g = _Graph(model)
    kinds: dict[str, Kind] = {n: Step(_neg(a, g.rank(n) or 3)) for n, a in sequence_inputs(model).items()}
    for node in model.graph.node:
        ins = [kinds.get(i) if i else None for i in node.input]
        if all(k is None for k in ins) and not _has_time_subgraph(node, kinds):
            continue
        try:
            outs = _rule(node, ins, g)
        except _Bad as e:
            raise NotCausal(layer_of(node), f"{node.op_type} {e}") from None
        for name, k in zip(node.output, outs, strict=False):
            if name:
                kinds[name] = k
    return kinds


def _has_time_subgraph(node: onnx.NodeProto, kinds: dict[str, Kind]) -> bool:
    """A control-flow node whose body reads a time-indexed value from the outer graph."""
    for a in node.attribute:
        if a.type == onnx.AttributeProto.GRAPH and any(kinds.get(i) is not None
                                                      for n in a.g.node for i in n.input):
            return True
    return False


class _Bad(Exception):
    pass


def _rule(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    op = node.op_type
    if op in RECURRENT_OPS:
        return _recurrent(node, ins)
    if op in ELEMENTWISE:
        return [_broadcast(ins)] * max(1, len(node.output))
    fn = _RULES.get(op)
    if fn is None:
        raise _Bad("is not known to keep each step independent of later steps")
    return fn(node, ins, g)


def _broadcast(ins: list[Kind]) -> Kind:
    steps = {k.axis for k in ins if isinstance(k, Step)}
    if steps and LATEST in ins:
        raise _Bad("combines per-step values with a summary of the whole window (attention-like); "
                   "step t would see the window's last step")
    if len(steps) > 1:
        raise _Bad("combines values whose time axes differ")
    return Step(steps.pop()) if steps else (LATEST if LATEST in ins else None)


def _recurrent(node: onnx.NodeProto, ins: list[Kind]) -> list[Kind]:
    direction = _attr(node, "direction", b"forward")
    direction = direction.decode() if isinstance(direction, bytes) else direction
    if direction != "forward":
        raise _Bad(f"runs direction={direction}: a backward pass starts from the window's last step, "
                   f"so it cannot carry state from call to call")
    if len(node.input) > 4 and node.input[4]:
        raise _Bad("has sequence_lens (masking or padded batches): which steps count depends on the "
                   "whole window")
    if ins[0] == Step(-2):  # the input's axis 1 (streamed as time) reaches the node as its batch axis
        raise _Bad("reads a time-major input ([time, batch, features], PyTorch's batch_first=False); "
                   "streaming cuts inputs along axis 1 — make the model batch-first (batch_first=True "
                   "and a [batch, time, features] input) to stream it")
    if ins[0] != Step(-3):
        raise _Bad("does not read its input along the time axis")
    if any(k is not None for k in ins[5:]):
        raise _Bad("starts from a state computed from the window (e.g. another layer's final state)")
    return [Step(-4), LATEST, LATEST]


def _one(ins: list[Kind]) -> Kind:
    return ins[0]


def _check_axis(k: Kind, axes: list[int], rank: int | None, what: str) -> None:
    if isinstance(k, Step) and rank is not None and k.axis in {_neg(a, rank) for a in axes}:
        raise _Bad(f"{what} over the time axis: step t would depend on other steps")


def _transpose(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    k = ins[0]
    if not isinstance(k, Step):
        return [k]
    perm = list(_attr(node, "perm", []))
    r = len(perm) or (g.rank(node.input[0]) or 0)
    perm = perm or list(range(r))[::-1]
    return [Step(perm.index(r + k.axis) - r)]


def _matmul(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    a, b = ins[0], ins[1]
    if b is not None:
        raise _Bad("multiplies by a time-dependent matrix (attention-like)")
    if isinstance(a, Step) and a.axis == -1:
        raise _Bad("contracts the time axis")
    return [a]


def _gemm(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    if any(k is not None for k in ins[1:]) or (isinstance(ins[0], Step) and _attr(node, "transA", 0)):
        raise _Bad("mixes steps")
    return [ins[0]]


def _axis_op(what: str) -> Callable[[onnx.NodeProto, list[Kind], _Graph], list[Kind]]:
    def rule(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
        axis = int(_attr(node, "axis", -1))
        r = g.rank(node.input[0])
        first = axis if axis >= 0 else (r or 0) + axis
        axes = [axis] if what != "normalisation" else list(range(first, r or 0))
        _check_axis(ins[0], axes, r, what)
        if isinstance(ins[0], Step) and r is None:
            raise _Bad("input rank unknown")
        return [ins[0]] * max(1, len(node.output))
    return rule


def _reduce(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    k, r = ins[0], g.rank(node.input[0])
    if not isinstance(k, Step):
        return [k]
    axes = g.ints(node, 1, "axes")
    if node.op_type in ("ArgMax", "ArgMin"):
        axes = [int(_attr(node, "axis", 0))]
    if not axes or r is None:
        raise _Bad("reduces over every axis, time included")
    _check_axis(k, axes, r, "reduction")
    if int(_attr(node, "keepdims", 1)):
        return [k]
    return [Step(k.axis + sum(1 for a in axes if _neg(a, r) > k.axis))]


def _step_axes(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> tuple[Kind, int | None, list[int] | None]:
    """(input kind, input rank, ``axes``) of a Squeeze/Unsqueeze; axes and rank must be known for a Step."""
    k, r = ins[0], g.rank(node.input[0])
    if not isinstance(k, Step):
        return k, r, None
    axes = g.ints(node, 1, "axes")
    if axes is None or r is None:
        raise _Bad("with axes or rank unknown")
    return k, r, axes


def _squeeze(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    k, r, axes = _step_axes(node, ins, g)
    if axes is None or r is None or not isinstance(k, Step):
        return [k]
    _check_axis(k, axes, r, "squeeze")
    return [Step(k.axis + sum(1 for a in axes if _neg(a, r) > k.axis))]


def _unsqueeze(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    k, r, axes = _step_axes(node, ins, g)
    if axes is None or r is None or not isinstance(k, Step):
        return [k]
    out_r = r + len(axes)
    inserted = {a % out_r for a in axes}
    kept = [p for p in range(out_r) if p not in inserted]
    return [Step(kept[r + k.axis] - out_r)]


def _reshape(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    k = ins[0]
    if ins[1] is not None and isinstance(ins[1], Step):
        raise _Bad("reshapes to a time-dependent shape")
    if not isinstance(k, Step):
        return [k]
    r, shape = g.rank(node.input[0]), g.consts.get(node.input[1])
    din, dout = g.dims.get(node.input[0]), g.dims.get(node.output[0])
    if r is None:
        raise _Bad("input rank unknown")
    p = r + k.axis
    if shape is not None and len(shape) > p and all(int(v) == 0 for v in np.ravel(shape)[:p + 1]):
        return [Step(p - len(shape))]
    if din and dout and len(dout) > p and din[:p + 1] == dout[:p + 1] and None not in din[:p + 1]:
        return [Step(p - len(dout))]
    raise _Bad("merges or splits the time axis with another axis")


def _concat(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    k = _broadcast(ins)
    r = g.rank(node.output[0])
    _check_axis(k, [int(_attr(node, "axis", 0))], r, "concatenation")
    return [k]


def _split(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    _check_axis(ins[0], [int(_attr(node, "axis", 0))], g.rank(node.input[0]), "split")
    return [ins[0]] * len(node.output)


def _slice(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    k, r = ins[0], g.rank(node.input[0])
    if not isinstance(k, Step):
        return [k]
    starts, ends = g.ints(node, 1, "starts"), g.ints(node, 2, "ends")
    axes, steps = g.ints(node, 3, "axes"), g.ints(node, 4, "steps")
    if starts is None or ends is None or r is None:
        raise _Bad("with bounds that are not constants")
    axes = axes if axes is not None else list(range(len(starts)))
    steps = steps or [1] * len(starts)
    for s, e, a, st in zip(starts, ends, axes, steps, strict=True):
        if _neg(a, r) == k.axis:
            if s == -1 and e >= INT64_BIG and st == 1:
                return [LATEST]
            raise _Bad("takes steps other than the latest along the time axis")
    return [k]


def _gather(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    data, idx = ins[0], ins[1]
    r, axis = g.rank(node.input[0]), int(_attr(node, "axis", 0))
    q, out_r = g.rank(node.input[1]), g.rank(node.output[0])
    if r is None or q is None or out_r is None:
        raise _Bad("with ranks unknown")
    pos = axis % r
    if isinstance(idx, Step):
        if data is not None:
            raise _Bad("indexes a time-dependent table")
        return [Step(pos + q + idx.axis - out_r)]
    if isinstance(data, Step):
        p = r + data.axis
        if p == pos:
            c = g.consts.get(node.input[1])
            if c is not None and c.size == 1 and int(np.ravel(c)[0]) == -1 and q == 0:
                return [LATEST]
            raise _Bad("picks steps other than the latest along the time axis")
        return [Step((p if p < pos else p - 1 + q) - out_r)]
    return [data]


def _meta(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    return [None] * len(node.output)


_REFUSED = {
    "Conv": "convolution over time needs samples from earlier calls",
    "MaxPool": "pooling over time", "AveragePool": "pooling over time",
    "GlobalAveragePool": "pooling over the whole window", "GlobalMaxPool": "pooling over the whole window",
    "Scan": "a loop over time (a user-written cell) cannot carry state across calls yet",
    "Loop": "a loop over time cannot carry state across calls", "If": "branches on the window",
    "Expand": "repeats values along new axes (e.g. a summary repeated over time)",
    "Tile": "repeats values along the time axis", "Pad": "pads the time axis",
    "CumSum": "a running sum over the window",
}


def _refused(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    raise _Bad(_REFUSED[node.op_type])


def _flatten(node: onnx.NodeProto, ins: list[Kind], g: _Graph) -> list[Kind]:
    if isinstance(ins[0], Step):
        raise _Bad("merges the time axis with others")
    return [ins[0]]


_RULES: dict[str, Callable[[onnx.NodeProto, list[Kind], _Graph], list[Kind]]] = {
    "Transpose": _transpose, "MatMul": _matmul, "Gemm": _gemm, "Reshape": _reshape, "Flatten": _flatten,
    "Softmax": _axis_op("softmax"), "LogSoftmax": _axis_op("softmax"), "Hardmax": _axis_op("softmax"),
    "LpNormalization": _axis_op("normalisation"), "LayerNormalization": _axis_op("normalisation"),
    "ReduceSum": _reduce, "ReduceMean": _reduce, "ReduceMax": _reduce, "ReduceMin": _reduce,
    "ReduceProd": _reduce, "ReduceL2": _reduce, "ReduceL1": _reduce, "ReduceLogSumExp": _reduce,
    "ReduceSumSquare": _reduce, "ArgMax": _reduce, "ArgMin": _reduce,
    "Squeeze": _squeeze, "Unsqueeze": _unsqueeze, "Concat": _concat, "Split": _split,
    "Slice": _slice, "Gather": _gather, "Shape": _meta, "Size": _meta, "ConstantOfShape": _meta,
    **{op: _refused for op in _REFUSED},
}
