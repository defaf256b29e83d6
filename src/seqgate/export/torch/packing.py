"""Packed sequences: ``pack_padded_sequence`` → RNN/GRU/LSTM → ``pad_packed_sequence`` on ONNX
``sequence_lens``, and the comparisons that build masks and lengths from a padding index.

PyTorch semantics (``torch.nn.utils.rnn`` docs) and their ONNX form:

- ``pack_padded_sequence(x, lengths, batch_first, enforce_sorted)``: row n holds its first
  ``lengths[n]`` steps. Exported as :class:`PackedV` = the time-major padded data plus the
  lengths (int32 for ``sequence_lens``, ONNX spec: int32 only). No sorting is needed: ONNX
  handles each row's length on its own, so ``enforce_sorted`` True or False give the same graph
  (PyTorch raises for unsorted lengths with ``enforce_sorted=True``; the graph computes them).
- A recurrent module on a packed input runs every stacked layer with ``sequence_lens``: Y is
  zero for t ≥ len, ``h_n``/``c_n`` hold the state after the last valid step (ONNX spec; the
  same as PyTorch for lengths ≥ 1).
- ``pad_packed_sequence(p, batch_first, padding_value, total_length)``:
  ``out[t] = y[t]`` for t < len, ``padding_value`` after; ``T_out = max(lengths)`` or
  ``total_length``; returns ``(out, lengths)``.
- **Length 0**: PyTorch refuses it (``pack_padded_sequence`` raises). The graph accepts it and
  gives, for that row, ``padding_value`` at every step and zero final states (ONNX's rule for
  ``len = 0``). verify never generates length 0 for a packed model, since PyTorch cannot run it.
- Lengths outside 0..T fail at run time in onnxruntime.

``torch.fx`` cannot trace ``pack_padded_sequence`` (it checks values); during tracing both
functions are recorded as leaf calls (see :func:`packing_leaves`). Imported only once torch is
loaded (by ``registry``, ``capture.trace`` and ``modules``).
"""

from __future__ import annotations

import operator
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch.nn.utils import rnn as rnn_utils

from seqgate.errors import Refusal
from seqgate.export.core.builder import INT32, INT64, GraphBuilder, np_to_onnx_type
from seqgate.export.torch.values import TV, DimV, Table, TorchCall, want_tensor

TABLE = Table()  # merged in registry.py
PACK = rnn_utils.pack_padded_sequence
PAD = rnn_utils.pad_packed_sequence
LEAVES = (PACK, PAD)


@dataclass(frozen=True)
class PackedV:
    """A packed sequence in the graph: time-major data ``[T, N, F]`` and the row lengths."""

    data_tnf: str
    lengths_i32: str  # [N] int32
    lengths_i64: str  # [N] int64 (what pad_packed_sequence returns)


@contextmanager
def packing_leaves(root: Any = None) -> Iterator[tuple[Any, ...]]:
    """While tracing, ``torch.nn.utils.rnn.pack_padded_sequence``/``pad_packed_sequence`` called on
    traced values become single fx ``call_function`` nodes, however ``forward`` reaches them: as
    ``nn.utils.rnn.…`` attributes (patched here), as names imported into the module's globals
    (the tracer's ``autowrap_functions``, which this yields) or as closure variables of the
    ``forward`` methods under ``root`` (their cells are swapped here)."""
    import torch.fx

    def leaf(fn: Any) -> Any:
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            found = [a for a in (*args, *kwargs.values()) if isinstance(a, torch.fx.Proxy)]
            if not found:
                return fn(*args, **kwargs)
            return found[0].tracer.create_proxy("call_function", fn, args, kwargs)

        return wrapper

    saved = {f.__name__: f for f in LEAVES}
    wrappers = {id(fn): leaf(fn) for fn in LEAVES}
    cells = _closure_cells(root)
    for name, fn in saved.items():
        setattr(rnn_utils, name, wrappers[id(fn)])
    for cell in cells:
        cell.cell_contents = wrappers[id(cell.cell_contents)]
    try:
        yield LEAVES
    finally:
        for name, fn in saved.items():
            setattr(rnn_utils, name, fn)
        by_wrapper = {id(w): fn for fn, w in zip(LEAVES, (wrappers[id(f)] for f in LEAVES), strict=True)}
        for cell in cells:
            cell.cell_contents = by_wrapper[id(cell.cell_contents)]


def unwrapped(graph: Any, leaves: tuple[Any, ...]) -> Any:
    """``graph`` without fx's ``is_wrapped`` mark on the packing calls: fx would emit a
    process-wide ``wrap("torch.nn.utils.rnn.…")`` into the generated code, which breaks every
    later trace (KeyError); a traced graph is never traced again."""
    for n in graph.nodes:
        if n.op == "call_function" and any(n.target is f for f in leaves):
            n.meta.pop("is_wrapped", None)
    return graph


def _closure_cells(root: Any) -> list[Any]:
    """Closure cells of every submodule's ``forward`` that hold one of :data:`LEAVES`."""
    if root is None:
        return []
    found: dict[int, Any] = {}
    leaves = {id(f) for f in LEAVES}
    for m in root.modules():
        for cell in getattr(type(m).forward, "__closure__", None) or ():
            try:
                if id(cell.cell_contents) in leaves:
                    found[id(cell)] = cell
            except ValueError:  # an empty cell
                continue
    return list(found.values())


@TABLE.add(PACK, sig=lambda input, lengths, batch_first=False, enforce_sorted=True: None)
def _pack(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> PackedV:
    x = want_tensor(a["input"], "input")
    if x.rank != 3:
        raise Refusal(f"packing an input of rank {x.rank}", "pack a [batch, time, features] tensor")
    lengths = a["lengths"]
    if not isinstance(lengths, TV):
        raise Refusal("lengths fixed at export time", "pass the lengths as a tensor input of forward()")
    data = b.transpose(x.name, [1, 0, 2]) if a["batch_first"] else x.name
    if data == x.name and x.dtype != "float32":
        raise Refusal(f"packing a {x.dtype} tensor")
    i64 = lengths.name if lengths.dtype == "int64" else b.op("Cast", [lengths.name], to=INT64)
    return PackedV(data, b.op("Cast", [lengths.name], to=INT32), i64)


@TABLE.add(PAD, sig=lambda sequence, batch_first=False, padding_value=0.0, total_length=None: None)
def _pad(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> tuple[str, str]:
    p = a["sequence"]
    if not isinstance(p, PackedV):
        raise Refusal("pad_packed_sequence of something other than a packed sequence")
    steps = _steps(b, p, a["total_length"])
    zero, one = b.const(np.asarray(0, np.int64), "zero"), b.const(np.asarray(1, np.int64), "one")
    t = b.op("Range", [zero, steps, one])
    valid = b.op("Less", [b.unsqueeze(t, [1]), b.unsqueeze(p.lengths_i64, [0])])  # [T, N]
    y = _fit_time(b, p.data_tnf, steps)
    value = b.scalar(float(a["padding_value"]), "padding_value")
    out = b.op("Where", [b.unsqueeze(valid, [2]), y, value])
    return (b.transpose(out, [1, 0, 2]) if a["batch_first"] else out), p.lengths_i64


def _steps(b: GraphBuilder, p: PackedV, total_length: Any) -> str:
    """0-d int64: ``max(lengths)`` (PyTorch's default) or ``total_length``."""
    if total_length is None:
        return b.reduce("ReduceMax", p.lengths_i64, [0], keepdims=False)
    if isinstance(total_length, DimV):  # total_length=x.size(1): the padded input's own length
        return b.squeeze(total_length.name, [0])
    if isinstance(total_length, bool) or not isinstance(total_length, int):
        raise Refusal(f"total_length={total_length!r}", "give total_length as an int or x.size(1)")
    return b.const(np.asarray(total_length, np.int64), "total_length")


def _fit_time(b: GraphBuilder, y: str, steps: str) -> str:
    """``y [T, N, F]`` cut or zero-extended to ``steps`` time steps."""
    t_len = b.op("Shape", [y], start=0, end=1)
    extra = b.op("Max", [b.op("Sub", [b.unsqueeze(steps, [0]), t_len]), b.ints([0], "zero")])
    pads = b.op("Concat", [b.ints([0, 0, 0], "pads_begin"), extra, b.ints([0, 0], "pads_end")], axis=0)
    padded = b.op("Pad", [y, pads], mode="constant")
    return b.op("Slice", [padded, b.ints([0], "starts"), b.unsqueeze(steps, [0]), b.ints([0], "axes")])


# ----- comparisons (masks from a padding index: x != 0) ---------------------------------------
def _compare(op: str, negate: bool = False) -> Any:
    def fn(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
        x, y = a["input"], a["other"]
        if not isinstance(x, TV):
            x, y = y, x
            op_ = {"Less": "Greater", "Greater": "Less", "LessOrEqual": "GreaterOrEqual",
                   "GreaterOrEqual": "LessOrEqual"}.get(op, op)
        else:
            op_ = op
        x = want_tensor(x, "input")
        if isinstance(y, TV):
            to = np_to_onnx_type(np.dtype(x.dtype))
            other = y.name if y.dtype == x.dtype else b.op("Cast", [y.name], to=to)
        elif isinstance(y, int | float) and not isinstance(y, bool):
            other = b.const(np.asarray(y, dtype=x.dtype), "other")
        else:
            raise Refusal(f"comparison with a {type(y).__name__}")
        out = b.op(op_, [x.name, other])
        return b.op("Not", [out]) if negate else out

    return fn


_cmp_sig = lambda input, other: None  # noqa: E731
for _op, _neg, _keys in (
    ("Equal", True, (operator.ne, torch.ne, "Tensor.ne")),
    ("Equal", False, (operator.eq, torch.eq, "Tensor.eq")),
    ("Greater", False, (operator.gt, torch.gt, "Tensor.gt")),
    ("Less", False, (operator.lt, torch.lt, "Tensor.lt")),
    ("GreaterOrEqual", False, (operator.ge, torch.ge, "Tensor.ge")),
    ("LessOrEqual", False, (operator.le, torch.le, "Tensor.le")),
):
    TABLE.add(*_keys, sig=_cmp_sig)(_compare(_op, _neg))

TABLE.add("Tensor.cpu", sig=lambda input, memory_format=None: None)(lambda b, call, a: want_tensor(a["input"]))


def padding_metadata(plan: Any) -> dict[str, str]:
    """``seqgate.padding`` for a lengths input of ``pack_padded_sequence`` (verify's padded sets):
    ``{"kind": "lengths", "lengths": NAME, "inputs": [sequence inputs], "patterns": ["right"],
    "min_length": 1}`` — right padding only (that is what lengths mean), never length 0
    (PyTorch refuses it)."""
    import json

    lengths = [s.name for s in plan.inputs if getattr(s, "fill", "") == "lengths"]
    if not lengths:
        return {}
    seqs = [s.name for s in plan.inputs if s.name not in lengths and "time" in s.dims]
    entries = [{"kind": "lengths", "lengths": n, "inputs": seqs, "patterns": ["right"], "min_length": 1}
               for n in lengths]
    return {"seqgate.padding": json.dumps(entries, sort_keys=True)}
