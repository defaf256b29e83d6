"""Item assignment ``x[idx] = v`` and ``torch.roll`` → ONNX, out of place.

Imported only once torch is loaded (by ``registry``, which merges its ``TABLE``, and by the
tracers). fx proxies get a ``__setitem__`` (:func:`record_setitem`)
that records ``operator.setitem(x, idx, v)``; its mapping returns :class:`Assigned`, and the
capture's walk rebinds ``x`` to the new value, so every later reader of ``x`` sees the update
(``inplace.setitem_problems`` refuses the cases where another tensor would share the change).

``x[idx] = v`` is ``Where(mask, V, x)``: ``mask`` is true on the assigned region, ``V`` is ``v``
cast to x's dtype (torch's ``copy_`` casts), broadcast to the region's shape (torch's rule;
leading size-1 dims of ``v`` beyond the region's rank are dropped, as torch does), then placed
in x's frame per indexed axis:

- an int ``i``: the axis keeps size 1 in ``V`` (Where broadcasts it); mask ``p == i mod n``;
- a slice with step 1: ``Pad`` by ``s'`` before and ``n − e'`` after, where ``s'``/``e'`` are the
  bounds clamped to ``[0, n]`` as Python does (also when n is a dynamic size); mask
  ``s' ≤ p < e'``;
- a constant 1-D index list or tensor on an axis of fixed size ``n``: ``Gather`` with the
  constant inverse map; mask from the list. Duplicates are refused (torch leaves their order
  unspecified).

Refused: an index that depends on the data (a computed tensor), slice steps other than 1,
``None`` in the index, index lists on an axis whose size follows an input dim, several lists.

``torch.roll(x, s, d)`` is ``Concat(x[n−k:], x[:n−k])`` along ``d`` with ``k = s mod n``
(``Mod`` with the sign of the divisor, as Python's ``%``, when ``n`` is dynamic); without
``dims`` it rolls the flattened tensor and restores the shape (torch's documented rule).
"""

from __future__ import annotations

import operator
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch

from seqgate.errors import Refusal
from seqgate.export.core.builder import GraphBuilder
from seqgate.export.torch.selection import operand
from seqgate.export.torch.shapes import expand_index
from seqgate.export.torch.values import (
    INT64_MAX,
    TV,
    Assigned,
    DimV,
    Table,
    TorchCall,
    dim_of,
    dim_scalar,
    shape_vector,
    want_int,
    want_tensor,
)

TABLE = Table()  # this module's mappings; merged in registry.py


def record_setitem(proxy: Any, index: Any, value: Any) -> None:
    """``Proxy.__setitem__``: record ``operator.setitem(x, index, value)`` in the traced graph."""
    proxy.tracer.create_proxy("call_function", operator.setitem, (proxy, index, value), {})


@dataclass
class _Axis:
    """One indexed axis: where ``V`` needs placing and which positions the mask holds."""

    axis: int
    kind: str  # "int", "slice", "list"
    n: int | DimV
    lo: Any = None  # int: the index; slice: s'; list: the positions
    hi: Any = None  # slice: e'


@TABLE.add(operator.setitem, sig=lambda obj, index, value: None)
def _setitem(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> Assigned:
    x = want_tensor(a["obj"], "the assigned tensor")
    return Assigned(assign(b, x, a["index"], a["value"]))


def assign(b: GraphBuilder, x: TV, idx: Any, v: Any) -> str:
    """The value of ``x`` after ``x[idx] = v`` (module docstring)."""
    items = expand_index(x, idx)
    if any(it is None for it in items):
        raise Refusal("None in an assigned index", "assign to x without the None")
    items += [slice(None)] * (x.rank - len(items))
    axes = [ax for k, it in enumerate(items) if (ax := _axis(b, x, k, it)) is not None]
    region: list[int | DimV] = []
    for k, it in enumerate(items):
        if not isinstance(it, int):
            region.append(next((_length(b, ax) for ax in axes if ax.axis == k), dim_of(b, x, k)))
    val = _broadcast(b, x, v, region)
    ints = [ax.axis for ax in axes if ax.kind == "int"]
    if ints:
        val = b.unsqueeze(val, ints)
    val = _place(b, x, val, axes)
    if not axes:
        return b.op("Expand", [val, b.op("Shape", [x.name])])
    return b.op("Where", [_mask(b, x, axes), val, x.name])


def _axis(b: GraphBuilder, x: TV, k: int, it: Any) -> _Axis | None:
    n = dim_of(b, x, k)
    if isinstance(it, bool) or isinstance(it, DimV):
        raise Refusal("an assigned index that depends on the input's sizes", "use constant indices")
    if isinstance(it, int):
        if isinstance(n, int) and not -n <= it < n:
            raise Refusal(f"index {it} is out of range for dim {k} of size {n}")
        return _Axis(k, "int", n, it)
    if isinstance(it, slice):
        if it == slice(None):
            return None
        step = 1 if it.step is None else want_int(it.step, "a slice step")
        if step != 1:
            raise Refusal(f"assigning to a slice with step {step}",
                          "assign with step 1, or build the tensor with torch.cat")
        lo = _bound(b, it.start, n, 0)
        hi = _bound(b, it.stop, n, n)
        return _Axis(k, "slice", n, lo, _maximum(b, hi, lo))
    return _Axis(k, "list", n, _positions(b, it, n, k))


def _positions(b: GraphBuilder, it: Any, n: int | DimV, k: int) -> list[int]:
    if isinstance(it, TV):
        arr = b.constant_value(it.name)
        if arr is None:
            raise Refusal("assigning through an index tensor computed from the data",
                          "the positions must be constant (a list of ints or a constant tensor)")
        if arr.ndim != 1 or arr.dtype.kind not in "iu":
            raise Refusal(f"assigning through a {arr.dtype} index tensor of rank {arr.ndim}",
                          "use a 1-D integer index")
        values = [int(i) for i in arr]
    else:
        values = [want_int(i, "an assigned index") for i in it]
    if not isinstance(n, int):
        raise Refusal(f"assigning through an index list on dim {k}, whose size depends on the input",
                      "index an axis of fixed size, or use slices")
    if any(not -n <= i < n for i in values):
        raise Refusal(f"an assigned index in {values} is out of range for dim {k} of size {n}")
    pos = [i % n for i in values]
    if len(set(pos)) != len(pos):
        raise Refusal(f"assigned index list {values} names a position twice",
                      "torch leaves the order unspecified; name each position once")
    return pos


def _bound(b: GraphBuilder, v: Any, n: int | DimV, default: int | DimV) -> int | str:
    """A slice bound clamped to ``[0, n]`` as Python does: an int, or a 0-d int64 ONNX value."""
    if v is None:
        return default if isinstance(default, int) else dim_scalar(b, default, "int64")
    i = want_int(v, "a slice bound")
    if isinstance(n, int):
        return max(0, min(i + n if i < 0 else i, n))
    ns = dim_scalar(b, n, "int64")
    if i < 0:
        return b.op("Max", [b.op("Add", [ns, b.scalar(i, "bound", np.int64)]), b.scalar(0, "zero", np.int64)])
    return b.op("Min", [ns, b.scalar(i, "bound", np.int64)])


def _maximum(b: GraphBuilder, x: int | str, y: int | str) -> int | str:
    if isinstance(x, int) and isinstance(y, int):
        return max(x, y)
    return b.op("Max", [_int_name(b, x), _int_name(b, y)])


def _int_name(b: GraphBuilder, v: int | str) -> str:
    return b.scalar(v, "bound", np.int64) if isinstance(v, int) else v


def _length(b: GraphBuilder, ax: _Axis) -> int | DimV:
    if ax.kind == "list":
        return len(ax.lo)
    if isinstance(ax.lo, int) and isinstance(ax.hi, int):
        return ax.hi - ax.lo
    return DimV(b.unsqueeze(b.op("Sub", [_int_name(b, ax.hi), _int_name(b, ax.lo)]), [0]))


def _broadcast(b: GraphBuilder, x: TV, v: Any, region: list[int | DimV]) -> str:
    """``v`` in x's dtype, broadcast to the region's shape (torch drops extra leading 1s)."""
    if isinstance(v, TV):
        extra = v.rank - len(region)
        if extra > 0:
            if any(d != 1 for d in v.shape[:extra]):
                raise Refusal(f"a value of shape {v.shape} for a region of rank {len(region)}")
            v = TV(b.squeeze(v.name, list(range(extra))), v.shape[extra:], v.dtype)
    elif not isinstance(v, int | float) or isinstance(v, bool):
        raise Refusal(f"assigning a {type(v).__name__}", "assign a tensor or a number")
    return b.op("Expand", [operand(b, v, x.dtype), shape_vector(b, region)])


def _place(b: GraphBuilder, x: TV, val: str, axes: list[_Axis]) -> str:
    """Pad slice axes and Gather list axes so ``val`` lines up with x (int axes broadcast)."""
    slices = [ax for ax in axes if ax.kind == "slice"]
    if slices:
        begins: list[int | DimV] = [0] * x.rank
        ends: list[int | DimV] = [0] * x.rank
        for ax in slices:
            begins[ax.axis] = _as_dim(b, ax.lo)
            after = (ax.n - ax.hi if isinstance(ax.n, int) and isinstance(ax.hi, int)
                     else b.op("Sub", [_int_name(b, _n_int(b, ax.n)), _int_name(b, ax.hi)]))
            ends[ax.axis] = _as_dim(b, after)
        val = b.op("Pad", [val, shape_vector(b, begins + ends)], mode="constant")
    for ax in axes:
        if ax.kind == "list":
            n = int(ax.n)  # type: ignore[arg-type]
            inverse = np.zeros(n, np.int64)
            inverse[ax.lo] = np.arange(len(ax.lo))
            val = b.op("Gather", [val, b.ints(list(inverse), "inverse")], axis=ax.axis)
    return val


def _n_int(b: GraphBuilder, n: int | DimV) -> int | str:
    return n if isinstance(n, int) else dim_scalar(b, n, "int64")


def _as_dim(b: GraphBuilder, v: int | str) -> int | DimV:
    return v if isinstance(v, int) else DimV(b.unsqueeze(v, [0]))


def _mask(b: GraphBuilder, x: TV, axes: list[_Axis]) -> str:
    """AND over the indexed axes of a 1-D position mask, each unsqueezed to x's rank."""
    mask = ""
    for ax in axes:
        if ax.kind == "list":
            m = np.zeros(int(ax.n), bool)  # type: ignore[arg-type]
            m[ax.lo] = True
            one = b.const(m, "mask")
        else:
            p = b.op("Range", [b.scalar(0, "zero", np.int64), _int_name(b, _n_int(b, ax.n)),
                               b.scalar(1, "one", np.int64)])
            if ax.kind == "int":
                at: int | str = ax.lo if ax.lo >= 0 or not isinstance(ax.n, int) else ax.lo + ax.n
                if isinstance(at, int) and at < 0:  # a negative index on a dynamic dim: n + i
                    at = b.op("Add", [_int_name(b, _n_int(b, ax.n)), b.scalar(at, "index", np.int64)])
                one = b.op("Equal", [p, _int_name(b, at)])
            else:
                one = b.op("And", [b.op("GreaterOrEqual", [p, _int_name(b, ax.lo)]),
                                   b.op("Less", [p, _int_name(b, ax.hi)])])
        others = [k for k in range(x.rank) if k != ax.axis]
        one = b.unsqueeze(one, others) if others else one
        mask = one if not mask else b.op("And", [mask, one])
    return mask


@TABLE.add(torch.roll, "Tensor.roll", sig=lambda input, shifts, dims=None: None)
def _roll(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    x = want_tensor(a["input"], "input")
    shifts = a["shifts"] if isinstance(a["shifts"], list | tuple) else [a["shifts"]]
    shifts = [want_int(s, "a shift") for s in shifts]
    if a["dims"] is None or a["dims"] == ():
        if len(shifts) != 1:
            raise Refusal(f"roll with {len(shifts)} shifts and no dims")
        flat = TV(b.op("Reshape", [x.name, b.ints([-1])]), (None,), x.dtype)
        return b.op("Reshape", [roll(b, flat, shifts[0], 0), b.op("Shape", [x.name])])
    dims = a["dims"] if isinstance(a["dims"], list | tuple) else [a["dims"]]
    if len(dims) != len(shifts):
        raise Refusal(f"roll with {len(shifts)} shifts for {len(dims)} dims")
    y = x
    for s, d in zip(shifts, dims, strict=True):
        y = TV(roll(b, y, s, x.axis(want_int(d, "dim"))), x.shape, x.dtype)
    return y.name if y.name != x.name else b.op("Identity", [x.name])


def roll(b: GraphBuilder, x: TV, shift: int, axis: int) -> str:
    """``torch.roll(x, shift, axis)``: the last ``k = shift mod n`` entries move to the front."""
    n = dim_of(b, x, axis)
    if isinstance(n, int):
        k = shift % n if n else 0
        if k == 0:
            return x.name
        cut: int | DimV = n - k
    else:
        k_name = b.op("Mod", [b.ints([shift], "shift"), n.name], fmod=0)
        cut = DimV(b.op("Sub", [n.name, k_name]))
    axes = b.ints([axis], "axes")
    tail = b.op("Slice", [x.name, shape_vector(b, [cut]), b.ints([INT64_MAX], "end"), axes])
    head = b.op("Slice", [x.name, b.ints([0], "start"), shape_vector(b, [cut]), axes])
    return b.op("Concat", [tail, head], axis=axis)
