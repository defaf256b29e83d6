"""Shape and indexing operations → ONNX (``TABLE``, merged by ``registry``).

Rules:
- Indexing ``x[...]`` with ints, negative ints, slices (step > 0), ``None`` and ``...``:
  one Slice for every int/slice (int ``i`` is ``[i, i+1)``, ``-1`` is ``[-1, end)``), then
  Squeeze of the int axes, then Unsqueeze for ``None``. A single int with nothing else is one
  Gather. A list holding slices is several indices (``x[[slice(None), slice(-3, None)]]``, as
  torch reads it). One int tensor or list of ints (``x[..., idx]``) is applied after the ints
  and slices, as torch does (``x[0, :, [1, 2]]`` has shape ``[3, 2]`` for ``x`` of shape
  ``[2, 3, 4]``; numpy would give ``[2, 3]``): one Gather on the axis it lands on. Bool masks
  and several tensor indices are refused.
- ``x.shape`` / ``x.size()`` are read lazily; a static dim is a Python int, a dynamic one is
  ``Shape(x, start=d, end=d+1)``; sizes feeding ``view``/``reshape``/``expand`` and
  ``torch.zeros`` are concatenated into one int64 shape vector, so the graph stays dynamic.
- ``view``/``reshape``: ONNX Reshape (``-1`` inferred). A literal 0 is refused (ONNX reads
  it as "copy the input dim").
- ``flatten(s, e)``: Reshape to ``[0]·s + [-1] + dims after e`` (0 copies a leading dim;
  dynamic trailing dims come from ``Shape(x, start=e+1)``).
- ``squeeze``: torch drops a dim only when it is 1. A static dim of 1 is squeezed, a static
  dim of another size is kept; a dim whose size follows a symbolic input dim is refused.
- ``expand``: ``-1`` keeps the input dim; ONNX Expand.  ``repeat``: ONNX Tile.
"""

from __future__ import annotations

import builtins
import operator
from typing import Any

import numpy as np
import torch

from seqgate.errors import Refusal
from seqgate.export.core.builder import GraphBuilder
from seqgate.export.torch.values import (
    INT64_MAX,
    TV,
    DimV,
    Opaque,
    ShapeV,
    Table,
    TorchCall,
    dim_of,
    shape_vector,
    size_parts,
    want_int,
    want_tensor,
)

TABLE = Table()  # this module's mappings; merged in registry.py


# ----- indexing ---------------------------------------------------------------------------
@TABLE.add(operator.getitem, sig=lambda obj, index: None)
def _getitem(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> Any:
    obj, idx = a["obj"], a["index"]
    if isinstance(obj, tuple | list):
        if isinstance(idx, int) or (isinstance(idx, slice) and all(
                v is None or isinstance(v, int) for v in (idx.start, idx.stop, idx.step))):
            return obj[idx]
        raise Refusal("indexing a tuple with a dynamic index")
    if isinstance(obj, ShapeV):
        return _shape_index(b, obj, idx)
    if isinstance(obj, TV):
        return index_tensor(b, obj, idx)
    raise Refusal(f"indexing a {type(obj).__name__}")


def _shape_index(b: GraphBuilder, s: ShapeV, idx: Any) -> Any:
    dims = s.dims
    if isinstance(idx, int):
        return dim_of(b, s.of, dims[idx])
    if isinstance(idx, slice) and idx.step in (None, 1):
        r = dims[idx]
        return ShapeV(s.of, r.start, r.stop)
    raise Refusal(f"indexing a shape with {idx!r}")


def index_items(idx: Any) -> list[Any]:
    """The items of an index as torch reads them: a tuple, or a short list holding a slice, ``None``,
    ``...``, a tensor or a sequence (torch's legacy rule, kept with a deprecation warning), is
    several indices; anything else (a list of ints included) is one."""
    if isinstance(idx, tuple):
        return list(idx)
    if isinstance(idx, list) and len(idx) < 32 and any(
            isinstance(it, slice | TV | list | tuple) or it is None or it is Ellipsis for it in idx):
        return list(idx)
    return [idx]


def expand_index(x: TV, idx: Any) -> list[Any]:
    """The items of ``idx`` with ``...`` expanded to full slices; bool masks refused."""
    items = index_items(idx)
    for it in items:
        if isinstance(it, bool) or (isinstance(it, TV) and it.dtype == "bool"):
            raise Refusal("indexing with a bool mask", "the result's size would depend on the data; use "
                          "torch.where to choose values instead")
    real = sum(1 for it in items if it is not None and it is not Ellipsis)
    if real > x.rank:
        raise Refusal(f"{real} indices for a tensor of rank {x.rank}")
    if items.count(Ellipsis) > 1:
        raise Refusal("more than one ... in an index")
    if Ellipsis in items:
        k = items.index(Ellipsis)
        items[k: k + 1] = [slice(None)] * (x.rank - real)
    return items


def _advanced(b: GraphBuilder, x: TV, items: list[Any]) -> tuple[int, TV] | None:
    """The one tensor (or list-of-ints) index among ``items``: its item position and index tensor."""
    found = [k for k, it in enumerate(items) if isinstance(it, TV | list | tuple)]
    if not found:
        return None
    if len(found) > 1:
        raise Refusal("indexing with more than one tensor or list index",
                      "index one axis at a time (x[:, i][:, :, j]), or use torch.gather")
    if None in items:
        raise Refusal("a tensor index together with None", "unsqueeze separately")
    k = found[0]
    it = items[k]
    if isinstance(it, TV):
        if it.dtype not in ("int64", "int32"):
            raise Refusal(f"indexing with a {it.dtype} tensor", "use an int64 index tensor")
        return k, it
    ints = [want_int(v, "a list index") for v in it]
    axis = sum(1 for v in items[:k] if v is not None)
    for i in ints:
        _check_bound(x, axis, i)
    return k, TV(b.ints(ints, "index"), (len(ints),), "int64")


def index_tensor(b: GraphBuilder, x: TV, idx: Any) -> str:
    """``x[idx]`` (module docstring)."""
    items = expand_index(x, idx)
    consumed = sum(1 for it in items if it is not None)
    items += [slice(None)] * (x.rank - consumed)
    adv = _advanced(b, x, items)
    if adv is not None:  # torch applies ints and slices first, then the one tensor index (Gather)
        k, index = adv
        basic = index_tensor(b, x, (*items[:k], slice(None), *items[k + 1:]))
        out_axis = sum(1 for it in items[:k] if not isinstance(it, int))
        return b.op("Gather", [basic, index.name], axis=out_axis)
    ints = [it for it in items if isinstance(it, int) or isinstance(it, DimV)]
    full = [it for it in items if isinstance(it, slice) and it == slice(None)]
    if len(ints) == 1 and isinstance(ints[0], int) and len(ints) + len(full) == len(items):
        axis = items.index(ints[0])
        _check_bound(x, axis, ints[0])
        return b.op("Gather", [x.name, b.const(_i64(ints[0]), "index")], axis=axis)
    starts: list[Any] = []
    ends: list[Any] = []
    axes: list[int] = []
    steps: list[int] = []
    squeeze: list[int] = []
    unsq: list[int] = []
    axis = out = 0
    for it in items:
        if it is None:
            unsq.append(out)
            out += 1
            continue
        if isinstance(it, DimV):
            raise Refusal("indexing with a size that depends on the input", "slice with [a:b] instead")
        if isinstance(it, int):
            _check_bound(x, axis, it)
            starts.append(it)
            ends.append(INT64_MAX if it == -1 else it + 1)
            axes.append(axis)
            steps.append(1)
            squeeze.append(axis)
        elif isinstance(it, slice):
            if it != slice(None) and it != slice(None, None, 1):
                step = 1 if it.step is None else want_int(it.step, "a slice step")
                if step <= 0:
                    raise Refusal(f"slice step {step}")
                starts.append(0 if it.start is None else it.start)
                ends.append(INT64_MAX if it.stop is None else it.stop)
                axes.append(axis)
                steps.append(step)
            out += 1
        else:
            raise Refusal(f"index {it!r}")
        axis += 1
    y = x.name
    if axes:
        bounds = [_vector(b, starts), _vector(b, ends), b.ints(axes, "axes"), b.ints(steps, "steps")]
        y = b.op("Slice", [y, *bounds])
    if squeeze:
        y = b.squeeze(y, squeeze)
    if unsq:
        y = b.unsqueeze(y, unsq)
    return y if y != x.name else b.op("Identity", [y])


def _vector(b: GraphBuilder, parts: list[Any]) -> str:
    for p in parts:
        if not isinstance(p, int | DimV):
            raise Refusal(f"slice bound {p!r}")
    return shape_vector(b, parts)


def _check_bound(x: TV, axis: int, i: int) -> None:
    n = x.shape[axis]
    if n is not None and not -n <= i < n:
        raise Refusal(f"index {i} is out of range for dim {axis} of size {n}")


def _i64(v: int) -> Any:
    import numpy as np

    return np.asarray(v, dtype=np.int64)


# ----- sizes and attributes ---------------------------------------------------------------
@TABLE.add("Tensor.size", sig=lambda input, dim=None: None)
def _size(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> Any:
    x = want_tensor(a["input"], "input")
    return ShapeV(x) if a["dim"] is None else dim_of(b, x, want_int(a["dim"], "dim"))


@TABLE.add("Tensor.dim", sig=lambda input: None)
def _dim(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> int:
    return want_tensor(a["input"]).rank


@TABLE.add(builtins.getattr, sig=lambda obj, name: None)
def _getattr(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> Any:
    obj, name = a["obj"], a["name"]
    if isinstance(obj, tuple) and len(obj) == 2 and name in ("values", "indices"):
        return obj[0 if name == "values" else 1]  # the (values, indices) of max/min
    x = want_tensor(obj)
    if name == "shape":
        return ShapeV(x)
    if name == "ndim":
        return x.rank
    if name == "dtype":
        return getattr(torch, x.dtype)
    if name in ("device", "is_cuda"):
        return Opaque(name)
    if name == "data":
        return x
    if name == "T":
        return transposed(b, x.name, list(range(x.rank))[::-1])
    if name == "mT" and x.rank >= 2:
        return _transpose(b, x, -1, -2)
    raise Refusal(f"tensor attribute {name!r}")


# ----- reshaping --------------------------------------------------------------------------
def reshape(b: GraphBuilder, x: TV, parts: list[int | DimV]) -> str:
    if any(isinstance(p, int) and p == 0 for p in parts):
        raise Refusal("a size of 0 in view/reshape")
    return b.op("Reshape", [x.name, shape_vector(b, parts)])


@TABLE.add("Tensor.view", "Tensor.reshape", sig=lambda input, *shape: None)
def _view(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    if a["shape"] and isinstance(a["shape"][0], torch.dtype):
        raise Refusal("view(dtype) reinterprets bytes", "use .to(dtype)")
    return reshape(b, want_tensor(a["input"]), size_parts(b, a["shape"]))


@TABLE.add(torch.reshape, sig=lambda input, shape: None)
def _torch_reshape(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    return reshape(b, want_tensor(a["input"]), size_parts(b, [a["shape"]]))


@TABLE.add("Tensor.view_as", "Tensor.reshape_as", sig=lambda input, other: None)
def _view_as(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    other = want_tensor(a["other"], "other")
    return b.op("Reshape", [want_tensor(a["input"]).name, b.op("Shape", [other.name])])


def flatten(b: GraphBuilder, x: TV, start: int, end: int) -> str:
    """``torch.flatten(x, start, end)`` (module docstring)."""
    if x.rank == 0:
        return b.reshape(x.name, [1])
    s, e = x.axis(start), x.axis(end)
    if s > e:
        raise Refusal(f"flatten start_dim {start} after end_dim {end}")
    if s == e:
        return b.op("Identity", [x.name])
    trailing = list(x.shape[e + 1:])
    tail: list[int | DimV]
    if all(d is not None for d in trailing):
        tail = [int(d) for d in trailing]  # type: ignore[arg-type]
    else:
        tail = [DimV(b.op("Shape", [x.name], start=e + 1))]
    return b.op("Reshape", [x.name, shape_vector(b, [*([0] * s), -1, *tail])])


@TABLE.add(torch.flatten, "Tensor.flatten", sig=lambda input, start_dim=0, end_dim=-1: None)
def _flatten(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    return flatten(b, want_tensor(a["input"]), want_int(a["start_dim"]), want_int(a["end_dim"]))


def transposed(b: GraphBuilder, name: str, perm: list[int]) -> str:
    """``Transpose``; of a constant (a weight: ``x @ self.w.t()``) the transposed constant itself,
    so that recognisers of recurrent steps (``core.cellmatch``) see the weight."""
    value = b.constant_value(name)
    if value is not None:
        return b.const(np.transpose(value, perm), f"{name}_t")
    return b.transpose(name, perm)


def _transpose(b: GraphBuilder, x: TV, d0: int, d1: int) -> str:
    perm = list(range(x.rank))
    i, j = x.axis(d0), x.axis(d1)
    perm[i], perm[j] = perm[j], perm[i]
    return transposed(b, x.name, perm)


@TABLE.add(torch.transpose, "Tensor.transpose", torch.swapaxes, "Tensor.swapaxes", torch.swapdims,
          "Tensor.swapdims", sig=lambda input, dim0, dim1: None)
def _transpose_entry(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    return _transpose(b, want_tensor(a["input"]), want_int(a["dim0"]), want_int(a["dim1"]))


@TABLE.add(torch.t, "Tensor.t", sig=lambda input: None)
def _t(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    """``x.t()`` (torch docs: a 0-D or 1-D tensor is returned as is; a 2-D one transposed)."""
    x = want_tensor(a["input"])
    if x.rank > 2:
        raise Refusal(f"t() of a rank-{x.rank} tensor (PyTorch accepts at most 2 dims)")
    return b.op("Identity", [x.name]) if x.rank < 2 else transposed(b, x.name, [1, 0])


@TABLE.add("Tensor.permute", sig=lambda input, *dims: None)
def _permute(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    dims = a["dims"][0] if len(a["dims"]) == 1 and isinstance(a["dims"][0], list | tuple) else a["dims"]
    return _permute_to(b, want_tensor(a["input"]), list(dims))


@TABLE.add(torch.permute, sig=lambda input, dims: None)
def _torch_permute(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    return _permute_to(b, want_tensor(a["input"]), list(a["dims"]))


def _permute_to(b: GraphBuilder, x: TV, dims: list[Any]) -> str:
    perm = [x.axis(want_int(d, "a permutation entry")) for d in dims]
    if sorted(perm) != list(range(x.rank)):
        raise Refusal(f"permutation {dims} of a rank-{x.rank} tensor")
    return transposed(b, x.name, perm)


@TABLE.add(torch.squeeze, "Tensor.squeeze", sig=lambda input, dim=None: None)
def _squeeze(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    x, dim = want_tensor(a["input"]), a["dim"]
    if dim is None:
        asked = list(range(x.rank))
    else:
        asked = [x.axis(want_int(d, "dim")) for d in (dim if isinstance(dim, list | tuple) else [dim])]
    dynamic = [d for d in asked if x.shape[d] is None]
    if dynamic:
        raise Refusal(f"squeeze of dim {dynamic[0]}, whose size depends on the input (torch drops it "
                      f"only when it happens to be 1)", "index it ([0]) or squeeze a dim of fixed size 1")
    axes = sorted({d for d in asked if x.shape[d] == 1})
    return b.squeeze(x.name, axes) if axes else b.op("Identity", [x.name])


@TABLE.add(torch.unsqueeze, "Tensor.unsqueeze", sig=lambda input, dim: None)
def _unsqueeze(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    x = want_tensor(a["input"])
    return b.unsqueeze(x.name, [x.axis(want_int(a["dim"], "dim"), extra=1)])


@TABLE.add("Tensor.contiguous", "Tensor.clone", sig=lambda input, memory_format=None: None)
def _same(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> TV:
    return want_tensor(a["input"])


TABLE.add("Tensor.detach", sig=lambda input: None)(_same)


@TABLE.add("Tensor.expand", sig=lambda input, *sizes: None)
def _expand(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    x = want_tensor(a["input"])
    parts = size_parts(b, a["sizes"])
    lead = len(parts) - x.rank
    if lead < 0:
        raise Refusal(f"expand to {len(parts)} dims from {x.rank}")
    fixed = [dim_of(b, x, i - lead) if isinstance(p, int) and p == -1 and i >= lead else p
             for i, p in enumerate(parts)]
    return b.op("Expand", [x.name, shape_vector(b, fixed)])


@TABLE.add("Tensor.expand_as", sig=lambda input, other: None)
def _expand_as(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    other = want_tensor(a["other"], "other")
    return b.op("Expand", [want_tensor(a["input"]).name, b.op("Shape", [other.name])])


@TABLE.add("Tensor.repeat", sig=lambda input, *sizes: None)
def _repeat(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    x = want_tensor(a["input"])
    parts = size_parts(b, a["sizes"])
    lead = len(parts) - x.rank
    if lead < 0:
        raise Refusal(f"repeat with {len(parts)} sizes for a rank-{x.rank} tensor")
    y = b.unsqueeze(x.name, list(range(lead))) if lead else x.name
    return b.op("Tile", [y, shape_vector(b, parts)])
