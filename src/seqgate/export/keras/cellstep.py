"""A Keras custom cell's ``call`` traced symbolically → the ONNX graph of one step (a Scan body).

Tracing (Keras functional tracing, never a run on numbers): ``x = keras.Input((I,))`` and one
``keras.Input((S_k,))`` per state; each ``keras.Variable`` attribute of the cell is swapped, for
the trace only, for a symbolic ``keras.Input(batch_shape=weight.shape)`` (TensorFlow refuses a
variable on the left of an op with a symbolic tensor), then ``cell.call(x, states)`` records its
``keras.ops`` calls and sublayer calls as graph nodes; ``keras.Model`` over them gives the
graph, walked in dependency order. Weights become initializers of the step graph.

Each node is mapped by :data:`STEP_OPS` (``keras.ops`` class → ONNX op, equations those of the
ops: ``Matmul``, ``Add``, ``Subtract``, ``Multiply``, ``Divide``, ``Negative``, ``Split``,
``Concatenate``, ``GetItem`` on the feature axis, ``Sigmoid``, ``Tanh``, ``Relu``, ``Softplus``,
``Softsign``, ``HardSigmoid`` = ``clip(x/6 + 1/2, 0, 1)`` (Keras 3), ``Exp``) or, for a sublayer
(a Dense inside the cell), by the Keras layer table. Anything else is a :class:`Refusal` naming
the op. Step graph: inputs ``[state_0 … state_{k−1}, x]``, outputs ``[new states…, output]``.
"""

from __future__ import annotations

import inspect
import itertools
from dataclasses import dataclass
from typing import Any

import numpy as np

from seqgate.errors import Refusal
from seqgate.export.core.builder import FLOAT, GraphBuilder
from seqgate.util.text import first_line

F32 = np.float32


@dataclass
class Step:
    """The traced step: its ONNX graph and which new state (if any) is the cell's output."""

    graph: Any
    state_sizes: list[int]
    output_state: int | None  # index of the new state that IS the output tensor, else None
    output_size: int = 0  # features of the step's output


def _state_sizes(cell: Any) -> list[int]:
    size = cell.state_size
    sizes = list(size) if isinstance(size, list | tuple) else [size]
    if not all(isinstance(s, int) for s in sizes):
        raise Refusal(f"state_size {size!r}", "custom cells with [batch, units] states only")
    return [int(s) for s in sizes]


def trace_cell(cell: Any, features: int) -> tuple[Any, list[Any], list[Any], dict[int, Any]]:
    """(functional step model, its inputs [x, states…], its outputs [output, new states…], weights)."""
    from seqgate.util.frameworks import import_keras

    keras = import_keras()
    x = keras.Input((features,), name="x")
    states = [keras.Input((s,), name=f"state_{k}") for k, s in enumerate(_state_sizes(cell))]
    swap = {k: v for k, v in vars(cell).items() if isinstance(v, keras.Variable)}
    stand_in = {k: keras.Input(batch_shape=tuple(v.shape), name=f"weight_{k}") for k, v in swap.items()}
    weights = {id(stand_in[k]): np.asarray(v.numpy(), F32) for k, v in swap.items()}
    kwargs = {"training": False} if "training" in inspect.signature(cell.call).parameters else {}
    for k, t in stand_in.items():
        object.__setattr__(cell, k, t)
    try:
        out, new = cell.call(x, list(states) if len(states) > 1 else [states[0]], **kwargs)
    except Exception as e:
        why = f"{type(e).__name__}: {first_line(e, 160)}"
        raise Refusal(f"its call() cannot be traced symbolically ({why})",
                      "write the cell with keras.ops and sublayers only, weights as attributes") from None
    finally:
        for k, v in swap.items():
            object.__setattr__(cell, k, v)
    new_list = list(new) if isinstance(new, list | tuple) else [new]
    if len(new_list) != len(states):
        raise Refusal(f"call() returns {len(new_list)} states for a state_size of {len(states)}")
    used = [t for t in stand_in.values()]
    model = keras.Model([x, *states, *used], [out, *new_list])
    return model, [x, *states], [out, *new_list], weights


def step_graph(cell: Any, features: int, opset: int, prefix: str, table: dict[str, Any]) -> Step:
    """Trace ``cell`` (module docstring) and build its step graph with a separate builder."""
    from seqgate.export.keras.call import KV
    from seqgate.sources.keras_graph import graph_nodes

    model, ins, outs, weights = trace_cell(cell, features)
    sub = GraphBuilder(opset, graph_name=f"{prefix}_step", framework="keras")
    values: dict[int, KV] = {}
    for t in ins[1:] + ins[:1]:  # Scan wants the states first, then the scanned input
        values[id(t)] = KV(sub.input(t.name, FLOAT, [None, int(t.shape[-1])]), tuple(t.shape))
    for t in model.inputs:
        if id(t) in weights:
            values[id(t)] = KV(sub.const(weights[id(t)], "weight"), tuple(t.shape))
    for node, op in graph_nodes(model):
        names = _map_node(sub, node, op, values, table)
        for t, n in zip(node.outputs, names, strict=True):
            values[id(t)] = KV(n, tuple(t.shape))
    out, new = outs[0], outs[1:]
    for k, t in enumerate(new):
        sub.output(values[id(t)].name, f"state_out_{k}", FLOAT, [None, int(t.shape[-1])])
    sub.output(values[id(out)].name, "step_out", FLOAT, [None, int(out.shape[-1])])
    same = [k for k, t in enumerate(new) if t is out]
    return Step(sub.build({}, check=False).graph, [int(t.shape[-1]) for t in new], same[0] if same else None,
                int(out.shape[-1]))


def _map_node(b: GraphBuilder, node: Any, op: Any, values: dict[int, Any], table: dict[str, Any]) -> list[str]:
    """One op of the traced step: a Keras layer through the walker's ``table``, else ``STEP_OPS``."""
    from seqgate.export.keras.call import KerasCall
    from seqgate.util.frameworks import import_keras

    cls = type(op).__name__
    if isinstance(op, import_keras().layers.Layer):
        fn = table.get(cls)
        if fn is None or not type(op).__module__.startswith("keras."):
            raise Refusal(f"its call() uses the layer {op.name} ({cls}), which seqgate does not map")
        ins = [values[id(t)] for t in node.input_tensors]
        call = KerasCall(op, op.name, ins, dict(node.arguments.kwargs), list(node.outputs),
                         tuple(node.arguments.args), values, table)
        return list(fn(b, call))
    fn = STEP_OPS.get(cls)
    if fn is None:
        raise Refusal(f"its call() uses keras.ops {cls}, which seqgate cannot map into ONNX")
    args = [values[id(a)].name if id(a) in values else a for a in node.arguments.args]
    res = fn(b, op, args, node)
    return res if isinstance(res, list) else [res]


def _operand(b: GraphBuilder, a: Any) -> str:
    if isinstance(a, str):
        return a
    if isinstance(a, int | float):
        return b.scalar(float(a), "scalar")
    raise Refusal(f"an operand of type {type(a).__name__}")


def _binary(onnx_op: str) -> Any:
    return lambda b, op, args, node: b.op(onnx_op, [_operand(b, args[0]), _operand(b, args[1])])


def _unary(onnx_op: str, **attrs: Any) -> Any:
    return lambda b, op, args, node: b.op(onnx_op, [_operand(b, args[0])], **attrs)


def _split(b: GraphBuilder, op: Any, args: list[Any], node: Any) -> list[str]:
    width = node.input_tensors[0].shape[op.axis]
    parts = op.indices_or_sections
    if isinstance(parts, int):
        sizes = [int(width) // parts] * parts
    else:
        bounds = [0, *[int(i) for i in parts], int(width)]
        sizes = [hi - lo for lo, hi in itertools.pairwise(bounds)]
    return b.node("Split", [args[0], b.ints(sizes, "split")], len(sizes), axis=int(op.axis))


def _concat(b: GraphBuilder, op: Any, args: list[Any], node: Any) -> str:
    return b.op("Concat", [_operand(b, a) for a in args[0]], axis=int(op.axis))


def _getitem(b: GraphBuilder, op: Any, args: list[Any], node: Any) -> str:
    key = args[1] if isinstance(args[1], tuple) else (args[1],)
    starts, ends, axes = [], [], []
    for axis, k in enumerate(key):
        if not isinstance(k, slice) or k.step not in (None, 1):
            raise Refusal(f"indexing with {k!r}", "slice the feature axis with start:stop only")
        if k.start is None and k.stop is None:
            continue
        starts.append(0 if k.start is None else int(k.start))
        ends.append(np.iinfo(np.int64).max if k.stop is None else int(k.stop))
        axes.append(axis)
    return b.slice(args[0], starts, ends, axes) if axes else b.op("Identity", [args[0]])


STEP_OPS: dict[str, Any] = {
    "Matmul": _binary("MatMul"),
    "Add": _binary("Add"),
    "Subtract": _binary("Sub"),
    "Multiply": _binary("Mul"),
    "Divide": _binary("Div"),
    "TrueDivide": _binary("Div"),
    "Negative": _unary("Neg"),
    "Sigmoid": _unary("Sigmoid"),
    "Tanh": _unary("Tanh"),
    "Relu": _unary("Relu"),
    "Softplus": _unary("Softplus"),
    "Softsign": _unary("Softsign"),
    "Exp": _unary("Exp"),
    "HardSigmoid": _unary("HardSigmoid", alpha=1.0 / 6.0, beta=0.5),
    "Split": _split,
    "Concatenate": _concat,
    "GetItem": _getitem,
}
