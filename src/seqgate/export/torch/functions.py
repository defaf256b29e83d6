"""Functions and tensor methods → ONNX: activations, arithmetic, reductions, joins, casts, constants.

Imported only once torch is loaded; its ``TABLE`` is merged by ``registry`` (shape and
indexing operations live in ``shapes``). Rules that are not a one-to-one op:

- Arithmetic follows torch type promotion for the cases seqgate exports: a float operand
  (tensor or Python float) or true division makes the result float32, else int64; the other
  operand is cast. ``a // b`` on floats is ``Floor(a / b)``. Python numbers combine in Python.
  Sizes that follow a dynamic dim (``x.size(0) * 2``) stay int64 ``[1]`` tensors.
- ``torch.add(x, y, alpha=a)`` is ``x + a·y``.
- Softplus: ``x if β·x > threshold else log(1 + exp(β·x))/β`` (torch's definition, with its
  linear branch), as ``Where(β·x > threshold, x, Softplus(β·x)/β)``.
- Softmax/LogSoftmax without ``dim``: torch's legacy choice, dim 0 for rank 0, 1 or 3, else 1.
- ``max``/``min`` with a dim: ``(ReduceMax, ArgMax)``; ArgMax keeps the first maximal index,
  as torch documents for ties.
- ``chunk``/``split`` need the split dim to be static (ONNX Split with explicit sizes).
- Functional dropout is the identity only when ``training=False`` or ``p=0`` (note that
  ``F.dropout``'s own default is ``training=True``).
"""

from __future__ import annotations

import operator
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from onnx import numpy_helper

from seqgate.errors import Refusal
from seqgate.export.core.activations import emit_activation
from seqgate.export.core.builder import GraphBuilder, np_to_onnx_type
from seqgate.export.torch.values import (
    TV,
    DimV,
    ShapeV,
    Table,
    TorchCall,
    dim_scalar,
    shape_part,
    shape_vector,
    size_parts,
    want_int,
    want_tensor,
)

TABLE = Table()  # this module's mappings; merged in registry.py

_LABEL_MODULES = {"_operator": "operator", "torch._C._nn": "torch.nn.functional", "torch._C._fft": "torch.fft",
                  "torch._C._linalg": "torch.linalg", "torch._C._special": "torch.special"}


def function_label(target: Any) -> str:
    """``torch.cat``, ``torch.nn.functional.relu``, ``operator.add`` … for messages."""
    mod = getattr(target, "__module__", None) or "torch"
    name = getattr(target, "__name__", repr(target))
    return f"{_LABEL_MODULES.get(mod, mod)}.{name}"


# ----- activations --------------------------------------------------------------------------
def activation(b: GraphBuilder, kind: str, x: TV, p: dict[str, Any]) -> str:
    """Emit a torch activation (module docstring for softplus and implicit softmax dims)."""
    if not x.dtype.startswith("float"):
        raise Refusal(f"{kind} of a {x.dtype} tensor", "activations are exported for float tensors")
    if kind == "softplus":
        return _softplus(b, x, float(p.get("beta", 1.0)), float(p.get("threshold", 20.0)))
    if kind in ("softmax", "log_softmax"):
        if p.get("dtype") is not None and p["dtype"] != torch.float32:
            raise Refusal(f"{kind} with dtype={p['dtype']}", "drop the dtype argument")
        dim = p.get("dim")
        if dim is None:
            dim = 0 if x.rank in (0, 1, 3) else 1
        return emit_activation(b, kind, x.name, {"axis": x.axis(int(dim))})
    if kind == "gelu":
        approx = p.get("approximate", "none")
        if approx not in ("none", "tanh"):
            raise Refusal(f"gelu approximate={approx!r}")
        return emit_activation(b, "gelu", x.name, {"approximate": approx == "tanh"})
    return emit_activation(b, kind, x.name, p)


def _softplus(b: GraphBuilder, x: TV, beta: float, threshold: float) -> str:
    bx = x.name if beta == 1.0 else b.op("Mul", [x.name, b.scalar(beta, "beta")])
    sp = b.op("Softplus", [bx])
    if beta != 1.0:
        sp = b.op("Div", [sp, b.scalar(beta, "beta")])
    linear = b.op("Greater", [bx, b.scalar(threshold, "threshold")])
    return b.op("Where", [linear, x.name, sp])


def _act(keys: tuple[Any, ...], kind: str, sig: Any, params: Any = None) -> None:
    def fn(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
        return activation(b, kind, want_tensor(a["input"], "input"), params(a) if params else {})

    TABLE.add(*keys, sig=sig)(fn)


_inplace = lambda input, inplace=False: None  # noqa: E731
_unary = lambda input: None  # noqa: E731
_f_softmax = lambda input, dim=None, _stacklevel=3, dtype=None: None  # noqa: E731
_t_softmax = lambda input, dim, dtype=None: None  # noqa: E731

_act((F.relu, torch.relu, "Tensor.relu"), "relu", _inplace)
_act((F.relu6,), "relu6", _inplace)
_act((torch.tanh, F.tanh, "Tensor.tanh"), "tanh", _unary)
_act((torch.sigmoid, F.sigmoid, "Tensor.sigmoid"), "sigmoid", _unary)
_act((F.gelu,), "gelu", lambda input, approximate="none": None, lambda a: {"approximate": a["approximate"]})
_act((F.silu,), "silu", _inplace)
_act((F.mish,), "mish", _inplace)
_act((F.softsign,), "softsign", _unary)
_act((F.hardsigmoid,), "hard_sigmoid", _inplace)
_act((F.hardswish,), "hard_silu", _inplace)
_act((F.logsigmoid,), "log_sigmoid", _unary)
_act((F.elu,), "elu", lambda input, alpha=1.0, inplace=False: None, lambda a: {"alpha": a["alpha"]})
_act((F.selu, torch.selu), "selu", _inplace,
     lambda a: {"alpha": 1.6732632423543772848170429916717, "gamma": 1.0507009873554804934193349852946})
_act((F.leaky_relu,), "leaky_relu", lambda input, negative_slope=0.01, inplace=False: None,
     lambda a: {"alpha": a["negative_slope"]})
_act((F.softplus,), "softplus", lambda input, beta=1.0, threshold=20.0: None, dict)
_act((F.hardtanh,), "hard_tanh", lambda input, min_val=-1.0, max_val=1.0, inplace=False: None,
     lambda a: {"min": a["min_val"], "max": a["max_val"]})
_act((F.softmax,), "softmax", _f_softmax, dict)
_act((torch.softmax, "Tensor.softmax"), "softmax", _t_softmax, dict)
_act((F.log_softmax,), "log_softmax", _f_softmax, dict)
_act((torch.log_softmax, "Tensor.log_softmax"), "log_softmax", _t_softmax, dict)

_ELEMENTWISE = {"exp": "Exp", "log": "Log", "sqrt": "Sqrt", "abs": "Abs", "neg": "Neg",
                "reciprocal": "Reciprocal", "rsqrt": None}


def _elementwise(op: str | None) -> Any:
    def fn(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
        t = want_tensor(a["input"], "input")
        x = t.name if op in ("Neg", "Abs") else _as_float(b, t)
        if op is None:  # rsqrt
            return b.op("Reciprocal", [b.op("Sqrt", [x])])
        return b.op(op, [x])

    return fn


for _name, _op in _ELEMENTWISE.items():
    TABLE.add(getattr(torch, _name), f"Tensor.{_name}", sig=_unary)(_elementwise(_op))
TABLE.add(operator.neg, sig=_unary)(_elementwise("Neg"))


def _dropout(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> Any:
    if a["training"] and a["p"]:
        raise Refusal(f"{call.label}(training=True, p={a['p']}) drops values at inference too",
                      "pass training=self.training (False in eval mode), or use an nn.Dropout module")
    return want_tensor(a["input"], "input")


TABLE.add(F.dropout, F.dropout1d, F.dropout2d, F.dropout3d,
         sig=lambda input, p=0.5, training=True, inplace=False: None)(_dropout)
TABLE.add(F.alpha_dropout, F.feature_alpha_dropout,
         sig=lambda input, p=0.5, training=False, inplace=False: None)(_dropout)


@TABLE.add(F.pad, sig=lambda input, pad, mode="constant", value=None: None)
def _pad(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    """F.pad: pairs (left, right) from the last dim backwards → ONNX pads [begins…, ends…]."""
    x = want_tensor(a["input"], "input")
    if a["mode"] != "constant":
        raise Refusal(f"F.pad mode={a['mode']!r}", "only constant padding is supported")
    pad = [want_int(p, "a pad") for p in a["pad"]]
    if len(pad) % 2 or len(pad) // 2 > x.rank:
        raise Refusal(f"F.pad with {len(pad)} pad values for a rank-{x.rank} tensor")
    begins, ends = [0] * x.rank, [0] * x.rank
    for i in range(len(pad) // 2):
        begins[x.rank - 1 - i], ends[x.rank - 1 - i] = pad[2 * i], pad[2 * i + 1]
    if min(pad) < 0:
        raise Refusal("F.pad with negative pads (cropping)", "slice with [a:b] instead")
    value = b.scalar(float(a["value"] or 0.0), "value", dtype=np.dtype(x.dtype).type)
    return b.op("Pad", [x.name, b.ints(begins + ends, "pads"), value], mode="constant")


# ----- arithmetic ---------------------------------------------------------------------------
_PY = {"Add": operator.add, "Sub": operator.sub, "Mul": operator.mul, "Div": operator.truediv,
       "FloorDiv": operator.floordiv, "Pow": operator.pow}


def _is_num(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool)


def _as_float(b: GraphBuilder, x: TV) -> str:
    return x.name if x.dtype == "float32" else b.op("Cast", [x.name], to=np_to_onnx_type(np.float32))


def _operand(b: GraphBuilder, v: Any, dtype: str) -> str:
    if isinstance(v, TV):
        if v.dtype == "bool":
            raise Refusal("arithmetic on a bool tensor")
        return v.name if v.dtype == dtype else b.op("Cast", [v.name], to=np_to_onnx_type(np.dtype(dtype)))
    if isinstance(v, DimV):
        return dim_scalar(b, v, dtype)
    if _is_num(v):
        return b.scalar(v, "scalar", dtype=np.dtype(dtype).type)
    raise Refusal(f"arithmetic with a {type(v).__name__}")


def binary(b: GraphBuilder, op: str, x: Any, y: Any) -> Any:
    """``x op y`` for tensors, Python numbers and dynamic sizes (module docstring)."""
    if _is_num(x) and _is_num(y):
        return _PY[op](x, y)
    if op == "Add" and all(isinstance(v, ShapeV | tuple) for v in (x, y)):  # x.shape + (1,)
        return tuple(_size_items(b, x) + _size_items(b, y))
    if not isinstance(x, TV) and not isinstance(y, TV):
        return _dim_binary(b, op, x, y)
    floats = any((isinstance(v, TV) and v.dtype.startswith("float")) or isinstance(v, float) for v in (x, y))
    dtype = "float32" if floats or op == "Div" else "int64"
    xn, yn = _operand(b, x, dtype), _operand(b, y, dtype)
    if op == "FloorDiv":
        q = b.op("Div", [xn, yn])
        return b.op("Floor", [q]) if dtype == "float32" else q
    return b.op(op, [xn, yn])


def _size_items(b: GraphBuilder, v: ShapeV | tuple[Any, ...]) -> list[Any]:
    return list(shape_part(b, v)) if isinstance(v, ShapeV) else list(v)


def _dim_binary(b: GraphBuilder, op: str, x: Any, y: Any) -> DimV:
    if op not in ("Add", "Sub", "Mul", "FloorDiv"):
        raise Refusal(f"{op} of sizes", "sizes combine with +, -, * and //")

    def name(v: Any) -> str:
        if isinstance(v, DimV):
            return v.name
        return b.ints([want_int(v, "a size operand")], "size")

    # Sizes are non-negative, so Div's truncation equals floor division here.
    return DimV(b.op("Div" if op == "FloorDiv" else op, [name(x), name(y)]))


def _binary_entry(op: str) -> Any:
    def fn(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> Any:
        other = a["other"]
        if a.get("alpha", 1) != 1:
            scaled = binary(b, "Mul", other, a["alpha"])
            other = TV(scaled, other.shape, "float32") if isinstance(other, TV) else scaled
        if a.get("rounding_mode") is not None:
            raise Refusal(f"rounding_mode={a['rounding_mode']!r}", "use // or torch.floor(a / b)")
        return binary(b, op, a["input"], other)

    return fn


_two = lambda input, other: None  # noqa: E731
for _op, _keys in {
    "Add": (operator.add,), "Sub": (operator.sub,), "Mul": (operator.mul,),
    "Div": (operator.truediv,), "FloorDiv": (operator.floordiv,), "Pow": (operator.pow,),
}.items():
    TABLE.add(*_keys, sig=_two)(_binary_entry(_op))
TABLE.add(torch.add, "Tensor.add", sig=lambda input, other, *, alpha=1, out=None: None)(_binary_entry("Add"))
TABLE.add(torch.sub, "Tensor.sub", sig=lambda input, other, *, alpha=1, out=None: None)(_binary_entry("Sub"))
TABLE.add(torch.mul, "Tensor.mul", sig=lambda input, other, *, out=None: None)(_binary_entry("Mul"))
TABLE.add(torch.div, "Tensor.div", torch.true_divide,
         sig=lambda input, other, *, rounding_mode=None, out=None: None)(_binary_entry("Div"))
TABLE.add(torch.pow, "Tensor.pow", sig=lambda input, exponent, *, out=None: None)(
    lambda b, call, a: binary(b, "Pow", a["input"], a["exponent"]))


@TABLE.add(operator.matmul, torch.matmul, "Tensor.matmul", torch.bmm, torch.mm, sig=_two)
def _matmul(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    return b.op("MatMul", [want_tensor(a["input"]).name, want_tensor(a["other"]).name])


@TABLE.add(F.linear, sig=lambda input, weight, bias=None: None)
def _f_linear(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    w = want_tensor(a["weight"], "weight")
    y = b.op("MatMul", [want_tensor(a["input"]).name, b.transpose(w.name, [1, 0])])
    return b.op("Add", [y, want_tensor(a["bias"]).name]) if a["bias"] is not None else y


# ----- reductions ---------------------------------------------------------------------------
def axes_of(x: TV, dim: Any) -> list[int]:
    """The non-negative axes a reduction's ``dim`` names (every axis for None or empty)."""
    if dim is None or dim == () or dim == []:
        return list(range(x.rank))
    dims = list(dim) if isinstance(dim, list | tuple) else [dim]
    return sorted({x.axis(want_int(d, "dim")) for d in dims})


def _reduce(op: str) -> Any:
    def fn(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
        if a.get("dtype") is not None:
            raise Refusal(f"{call.label} with dtype={a['dtype']}", "cast the input first")
        x = want_tensor(a["input"], "input")
        name = _as_float(b, x) if op == "ReduceMean" else x.name
        if x.dtype == "bool" and op == "ReduceSum":  # torch sums a bool tensor as int64
            name = b.op("Cast", [x.name], to=np_to_onnx_type(np.int64))
        return b.reduce(op, name, axes_of(x, a["dim"]), keepdims=bool(a["keepdim"]))

    return fn


_red_sig = lambda input, dim=None, keepdim=False, *, dtype=None, out=None: None  # noqa: E731
TABLE.add(torch.mean, "Tensor.mean", sig=_red_sig)(_reduce("ReduceMean"))
TABLE.add(torch.sum, "Tensor.sum", sig=_red_sig)(_reduce("ReduceSum"))
TABLE.add(torch.amax, "Tensor.amax", sig=lambda input, dim=(), keepdim=False, *, out=None: None)(
    _reduce("ReduceMax"))
TABLE.add(torch.amin, "Tensor.amin", sig=lambda input, dim=(), keepdim=False, *, out=None: None)(
    _reduce("ReduceMin"))


def _max_min(op: str) -> Any:
    def fn(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> Any:
        x, dim = want_tensor(a["input"], "input"), a["dim"]
        if isinstance(dim, TV):  # torch.max(a, b): elementwise
            return b.op(op, [x.name, dim.name])
        if dim is None:
            return b.reduce(f"Reduce{op}", x.name, list(range(x.rank)), keepdims=False)
        axis, keep = x.axis(want_int(dim, "dim")), bool(a["keepdim"])
        values = b.reduce(f"Reduce{op}", x.name, [axis], keepdims=keep) if call.uses(0) else None
        arg = f"Arg{op}"
        idx = b.op(arg, [x.name], axis=axis, keepdims=int(keep), select_last_index=0) if call.uses(1) else None
        return (values, idx)

    return fn


_MAX_MIN_SIG = lambda input, dim=None, keepdim=False, *, out=None: None  # noqa: E731
TABLE.add(torch.max, "Tensor.max", sig=_MAX_MIN_SIG)(_max_min("Max"))
TABLE.add(torch.min, "Tensor.min", sig=_MAX_MIN_SIG)(_max_min("Min"))


# ----- joins and splits ---------------------------------------------------------------------
def _tensors(a: Any) -> list[TV]:
    ts = [want_tensor(t, "a joined tensor") for t in a]
    if len({t.dtype for t in ts}) > 1:
        raise Refusal("joining tensors of different dtypes", "cast them to one dtype first")
    return ts


@TABLE.add(torch.cat, torch.concat, sig=lambda tensors, dim=0, *, out=None: None)
def _cat(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    ts = _tensors(a["tensors"])
    return b.op("Concat", [t.name for t in ts], axis=ts[0].axis(want_int(a["dim"], "dim")))


@TABLE.add(torch.stack, sig=lambda tensors, dim=0, *, out=None: None)
def _stack(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    ts = _tensors(a["tensors"])
    axis = ts[0].axis(want_int(a["dim"], "dim"), extra=1)
    return b.op("Concat", [b.unsqueeze(t.name, [axis]) for t in ts], axis=axis)


def _split(b: GraphBuilder, x: TV, sizes: list[int], axis: int) -> tuple[str, ...]:
    return tuple(b.node("Split", [x.name, b.ints(sizes, "split")], len(sizes), axis=axis))


def _static_dim(x: TV, dim: Any) -> tuple[int, int]:
    axis = x.axis(want_int(dim, "dim"))
    n = x.shape[axis]
    if n is None:
        raise Refusal(f"splitting dim {axis}, whose size depends on the input",
                      "split along a dim of fixed size (features), or slice with [a:b]")
    return axis, n


@TABLE.add(torch.chunk, "Tensor.chunk", sig=lambda input, chunks, dim=0: None)
def _chunk(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> tuple[str, ...]:
    x = want_tensor(a["input"], "input")
    axis, n = _static_dim(x, a["dim"])
    size = -(-n // want_int(a["chunks"], "chunks"))
    sizes = [min(size, n - i) for i in range(0, n, size)]
    return _split(b, x, sizes, axis)


@TABLE.add(torch.split, "Tensor.split", sig=lambda input, split_size_or_sections, dim=0: None)
def _split_entry(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> tuple[str, ...]:
    x = want_tensor(a["input"], "input")
    axis, n = _static_dim(x, a["dim"])
    s = a["split_size_or_sections"]
    if isinstance(s, list | tuple):
        sizes = [want_int(v, "a section") for v in s]
    else:
        step = want_int(s, "split_size")
        sizes = [min(step, n - i) for i in range(0, n, step)]
    return _split(b, x, sizes, axis)


# ----- casts and constants ------------------------------------------------------------------
_DTYPES = {torch.float32: "float32", torch.int64: "int64", torch.int32: "int32", torch.bool: "bool"}


def cast(b: GraphBuilder, x: TV, dtype: Any) -> str:
    name = _DTYPES.get(dtype) if not isinstance(dtype, str) else dtype
    if name is None:
        raise Refusal(f"cast to {dtype}", "seqgate exports float32, int64, int32 and bool tensors")
    return x.name if x.dtype == name else b.op("Cast", [x.name], to=np_to_onnx_type(np.dtype(name)))


_self_only = lambda input, memory_format=None: None  # noqa: E731
for _meth, _dt in (("float", torch.float32), ("long", torch.int64), ("int", torch.int32), ("bool", torch.bool)):
    TABLE.add(f"Tensor.{_meth}", sig=_self_only)(
        lambda b, call, a, _dt=_dt: cast(b, want_tensor(a["input"]), _dt))


@TABLE.add("Tensor.to", sig=lambda input, *args, **kwargs: None)
def _to(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    x = want_tensor(a["input"], "input")
    dtype = a["kwargs"].get("dtype")
    for v in a["args"]:
        if isinstance(v, torch.dtype):
            dtype = v
        elif isinstance(v, TV):
            dtype = v.dtype
    return x.name if dtype is None else cast(b, x, dtype)


@TABLE.add("Tensor.type_as", sig=_two)
def _type_as(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    return cast(b, want_tensor(a["input"]), want_tensor(a["other"]).dtype)


def _filled(b: GraphBuilder, shape: str, value: float, dtype: Any) -> str:
    name = _DTYPES.get(dtype, None) if dtype is not None else "float32"
    if name is None:
        raise Refusal(f"dtype={dtype}")
    return b.op("ConstantOfShape", [shape], value=numpy_helper.from_array(np.array([value], dtype=name)))


def _fill_entry(value: float) -> Any:
    def fn(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
        return _filled(b, shape_vector(b, size_parts(b, a["size"])), value, a["dtype"])

    return fn


_factory = lambda *size, out=None, dtype=None, layout=None, device=None, pin_memory=False, requires_grad=False: None  # noqa: E731,E501
TABLE.add(torch.zeros, sig=_factory)(_fill_entry(0.0))
TABLE.add(torch.ones, sig=_factory)(_fill_entry(1.0))


@TABLE.add(torch.full, sig=lambda size, fill_value, *, out=None, dtype=None, layout=None, device=None,
          pin_memory=False, requires_grad=False: None)
def _full(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    v = a["fill_value"]
    if not isinstance(v, int | float):
        raise Refusal("fill_value is not a number fixed at export time (a size of a dynamic dim, or a tensor)")
    dtype = a["dtype"] or (torch.int64 if isinstance(v, int) and not isinstance(v, bool) else torch.float32)
    return _filled(b, shape_vector(b, size_parts(b, [a["size"]])), float(v), dtype)


def _like_entry(value: float) -> Any:
    def fn(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
        x = want_tensor(a["input"], "input")
        return _filled(b, b.op("Shape", [x.name]), value, a["dtype"] or _dtype_of(x))

    return fn


def _new_entry(value: float) -> Any:
    def fn(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
        x = want_tensor(a["input"], "input")
        return _filled(b, shape_vector(b, size_parts(b, a["size"])), value, a["dtype"] or _dtype_of(x))

    return fn


def _dtype_of(x: TV) -> Any:
    return {v: k for k, v in _DTYPES.items()}[x.dtype]


_like = lambda input, *, dtype=None, layout=None, device=None, requires_grad=False, memory_format=None: None  # noqa: E731
_new = lambda input, *size, dtype=None, device=None, requires_grad=False, layout=None, pin_memory=False: None  # noqa: E731
TABLE.add(torch.zeros_like, sig=_like)(_like_entry(0.0))
TABLE.add(torch.ones_like, sig=_like)(_like_entry(1.0))
TABLE.add("Tensor.new_zeros", sig=_new)(_new_entry(0.0))
TABLE.add("Tensor.new_ones", sig=_new)(_new_entry(1.0))
