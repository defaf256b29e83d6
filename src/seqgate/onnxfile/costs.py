"""Cost model: parameters and multiply-accumulates (MACs) read from an ONNX graph.

Counted MACs (elementwise work, activations and gate arithmetic are not counted):

- RNN/GRU/LSTM: ``T · D · G · H · (I + H)`` — the input and recurrent matrix products of every
  gate per step (G = 1, 3, 4); from the LSTM/GRU/Elman equations each gate pre-activation is
  ``W x_t + R h_{t−1}``.
- MatMul ``[…, K] × [K, M]``: ``(product of the leading dims) · K · M``; Gemm ``M·K·N``.
- Conv: ``(output elements) · (C_in / group) · (kernel size)``.

Cost per sequence is linear in the length: ``macs(T) = per_sequence + per_step · T``. Both terms
are found by shape-inferring the graph at batch 1 with the time dims set to two lengths and
differencing, so dense heads after the last state count per sequence and time-distributed
layers per step, with no per-op special cases.

A time dim is a symbolic input dim whose name contains ``time``, or one at axis 1 of an input
(the ``[batch, time, ...]`` convention) unless its name contains ``batch``; every other
symbolic dim is set to 1.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass
from typing import Any

import numpy as np
import onnx
from onnx import numpy_helper, shape_inference

from seqgate.util.dims import split_dim

_GATES = {"RNN": 1, "GRU": 3, "LSTM": 4}
_T1, _T2 = 8, 16


@dataclass(frozen=True)
class NodeCost:
    """Cost of one node: parameters (float elements of its initializers) and MACs = a + b·T."""

    node: str
    op_type: str
    params: int
    macs_per_sequence: int
    macs_per_step: int


def time_dim_names(model: onnx.ModelProto) -> set[str]:
    """Names of the symbolic input dims that are time (see the module docstring)."""
    names: set[str] = set()
    for vi in model.graph.input:
        dims = vi.type.tensor_type.shape.dim
        for axis, d in enumerate(dims):
            if not d.HasField("dim_param") or "batch" in d.dim_param:
                continue
            if "time" in d.dim_param or axis == 1:
                names.add(d.dim_param)
    return names


def _fixed_dims(model: onnx.ModelProto, t: int) -> onnx.ModelProto:
    m = copy.deepcopy(model)
    time_names = time_dim_names(model)
    for vi in m.graph.input:
        for d in vi.type.tensor_type.shape.dim:
            if d.HasField("dim_param"):
                name = d.dim_param
                base, offset = split_dim(name)  # time+6: six steps more than the time axis
                d.Clear()
                d.dim_value = max(1, (t if name in time_names or base in time_names else 1) + offset)
    del m.graph.value_info[:]
    for o in m.graph.output:
        for d in o.type.tensor_type.shape.dim:
            d.Clear()
    return shape_inference.infer_shapes(m, data_prop=True)


def _shapes(m: onnx.ModelProto) -> dict[str, list[int]]:
    out: dict[str, list[int]] = {}
    for vi in [*m.graph.input, *m.graph.value_info, *m.graph.output]:
        dims = vi.type.tensor_type.shape.dim
        if all(d.HasField("dim_value") for d in dims):
            out[vi.name] = [int(d.dim_value) for d in dims]
    for init in m.graph.initializer:
        out[init.name] = [int(d) for d in init.dims]
    return out


def _node_macs(n: onnx.NodeProto, shapes: dict[str, list[int]]) -> int:
    op = n.op_type
    if op in _GATES:
        x, w, r = (shapes.get(n.input[i]) for i in range(3))
        if x is None or w is None or r is None:
            return 0
        return int(x[0]) * int(w[0]) * int(w[1]) * (int(w[2]) + int(r[2]))
    if op == "MatMul":
        a, b = shapes.get(n.input[0]), shapes.get(n.input[1])
        if a is None or b is None:
            return 0
        return int(np.prod(a[:-1], dtype=np.int64)) * int(a[-1]) * int(b[-1])
    if op == "Gemm":
        a, y = shapes.get(n.input[0]), shapes.get(n.output[0])
        if a is None or y is None:
            return 0
        trans_a = next((at.i for at in n.attribute if at.name == "transA"), 0)
        k = a[0] if trans_a else a[1]
        return int(y[0]) * int(y[1]) * int(k)
    if op == "Conv":
        w, y = shapes.get(n.input[1]), shapes.get(n.output[0])
        if w is None or y is None:
            return 0
        return int(np.prod(y, dtype=np.int64)) * int(np.prod(w[1:], dtype=np.int64))
    return 0


def _params(model: onnx.ModelProto) -> dict[str, int]:
    sizes = {}
    for init in model.graph.initializer:
        if init.data_type in (onnx.TensorProto.FLOAT, onnx.TensorProto.FLOAT16, onnx.TensorProto.DOUBLE):
            sizes[init.name] = int(np.prod(init.dims, dtype=np.int64))
    return sizes


def has_dynamic_time(model: onnx.ModelProto) -> bool:
    """True when some graph input has a symbolic time dim."""
    return bool(time_dim_names(model))


def node_costs(model: onnx.ModelProto) -> list[NodeCost]:
    """Cost of every node, in graph order (see the module docstring)."""
    sizes = _params(model)
    dynamic = has_dynamic_time(model)
    s1 = _shapes(_fixed_dims(model, _T1))
    s2 = _shapes(_fixed_dims(model, _T2)) if dynamic else s1
    fixed_t = None if dynamic else _fixed_time(model)
    out: list[NodeCost] = []
    for n in model.graph.node:
        m1, m2 = _node_macs(n, s1), _node_macs(n, s2)
        if dynamic:
            per_step = (m2 - m1) // (_T2 - _T1)
            per_seq = m1 - per_step * _T1
        elif fixed_t and n.op_type in _GATES:
            per_step, per_seq = m1 // fixed_t, 0
        else:
            per_step, per_seq = 0, m1
        params = sum(sizes.get(i, 0) for i in n.input)
        out.append(NodeCost(n.name, n.op_type, params, int(per_seq), int(per_step)))
    return out


def _fixed_time(model: onnx.ModelProto) -> int | None:
    for vi in model.graph.input:
        dims = vi.type.tensor_type.shape.dim
        if len(dims) >= 2 and dims[1].HasField("dim_value"):
            return int(dims[1].dim_value)
    return None


def total_params(model: onnx.ModelProto) -> int:
    """Float parameters of the whole graph."""
    return sum(_params(model).values())


def parameter_bytes(model: onnx.ModelProto) -> int:
    """Bytes of all initializers."""
    return sum(numpy_helper.to_array(i).nbytes for i in model.graph.initializer)


def macs_for_length(model: onnx.ModelProto, t: int) -> int:
    """MACs of one sequence of length ``t`` at batch 1."""
    costs = node_costs(model)
    return sum(c.macs_per_sequence + c.macs_per_step * t for c in costs)


def summary(model: onnx.ModelProto) -> dict[str, Any]:
    """Totals: params, parameter bytes, MACs per step and per sequence."""
    costs = node_costs(model)
    return {
        "params": total_params(model),
        "parameter_bytes": parameter_bytes(model),
        "macs_per_step": sum(c.macs_per_step for c in costs),
        "macs_per_sequence": sum(c.macs_per_sequence for c in costs),
    }
