"""Elementwise choice → ONNX: ``torch.where``, ``masked_fill``, ``clamp``/``clamp_min``/``clamp_max``.

Imported only once torch is loaded (by ``registry``, which merges its ``TABLE``). Rules:

- Operands may be tensors or Python numbers; they broadcast (ONNX ``Where``/``Max``/``Min`` use
  numpy-style multidirectional broadcasting, as torch does). The result dtype follows torch's
  promotion (:func:`promoted`): the highest category (bool < int < float) wins; within it,
  tensors with dims decide before 0-d tensors, which decide before Python numbers (a Python
  float with an int tensor gives float32; a Python int with an int32 tensor stays int32).
- ``torch.where(cond, a, b)`` is ``Where(cond, a, b)``; ``cond`` must be a bool tensor (torch
  refuses any other dtype). ``x.where(cond, y)`` is ``torch.where(cond, x, y)``;
  ``x.masked_fill(mask, v)`` is ``Where(mask, v, x)`` in x's dtype.
- ``clamp(x, lo, hi)`` is ``Min(Max(x, lo), hi)`` — torch's documented definition, so ``lo > hi``
  gives ``hi``. Number bounds use ``Clip`` (whose spec says the same: ``Min(max, Max(input, min))``),
  tensor bounds ``Max``/``Min`` (Clip takes only scalar bounds). NaN in ``x`` stays NaN in torch,
  and ONNX Runtime 1.32 and ``onnx.reference`` propagate it through Clip, Max and Min too
  (measured; the operator specs do not say). A NaN bound is refused (exported as Max/Min, its
  outcome would rest on an unspecified corner of the ONNX operators).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import torch

from seqgate.errors import Refusal
from seqgate.export.core.builder import GraphBuilder, np_to_onnx_type
from seqgate.export.torch.values import TV, Table, TorchCall, want_tensor

TABLE = Table()  # this module's mappings; merged in registry.py

_CATEGORY = {"bool": 0, "int32": 1, "int64": 1, "float32": 2}
_DEFAULT = {0: "bool", 1: "int64", 2: "float32"}


def _category(v: Any) -> int:
    if isinstance(v, TV):
        if v.dtype not in _CATEGORY:
            raise Refusal(f"a {v.dtype} tensor", "seqgate exports float32, int64, int32 and bool tensors")
        return _CATEGORY[v.dtype]
    if isinstance(v, bool):
        return 0
    if isinstance(v, int):
        return 1
    if isinstance(v, float):
        return 2
    raise Refusal(f"an operand that is a {type(v).__name__}", "use tensors or Python numbers")


def promoted(*operands: Any) -> str:
    """torch's result dtype for tensors and Python numbers mixed (module docstring)."""
    top = max(_category(v) for v in operands)
    for group in ([v for v in operands if isinstance(v, TV) and v.rank > 0],
                  [v for v in operands if isinstance(v, TV) and v.rank == 0]):
        same = [v.dtype for v in group if _CATEGORY[v.dtype] == top]
        if same:
            return "int64" if "int64" in same else same[0]
    return _DEFAULT[top]


def operand(b: GraphBuilder, v: Any, dtype: str) -> str:
    """A tensor (cast to ``dtype`` when it differs) or a number as a 0-d constant of ``dtype``."""
    if isinstance(v, TV):
        return v.name if v.dtype == dtype else b.op("Cast", [v.name], to=np_to_onnx_type(np.dtype(dtype)))
    return b.scalar(v, "scalar", dtype=np.dtype(dtype).type)


def _condition(v: Any, what: str) -> TV:
    c = want_tensor(v, what)
    if c.dtype != "bool":
        raise Refusal(f"{what} is a {c.dtype} tensor; torch requires a bool one",
                      f"compare it first ({what} != 0)")
    return c


def where(b: GraphBuilder, cond: Any, x: Any, y: Any) -> str:
    """``torch.where(cond, x, y)`` as ONNX ``Where`` (module docstring)."""
    c = _condition(cond, "condition")
    dtype = promoted(x, y)
    return b.op("Where", [c.name, operand(b, x, dtype), operand(b, y, dtype)])


@TABLE.add("Tensor.where", sig=lambda input, condition, other: None)
def _tensor_where(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    return where(b, a["condition"], want_tensor(a["input"], "input"), a["other"])


@TABLE.add("Tensor.masked_fill", sig=lambda input, mask, value: None)
def _masked_fill(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    x = want_tensor(a["input"], "input")
    v = a["value"]
    if isinstance(v, TV) and v.rank > 0:
        raise Refusal(f"masked_fill with a value of rank {v.rank}", "torch takes a number or a 0-d tensor")
    c = _condition(a["mask"], "mask")
    return b.op("Where", [c.name, operand(b, v, x.dtype), x.name])


def _where_entry(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    if a["input"] is None or a["other"] is None:
        raise Refusal("torch.where(condition) with one argument (the indices where it holds)",
                      "the number of such indices depends on the data; use torch.where(cond, a, b)")
    return where(b, a["condition"], a["input"], a["other"])


TABLE.add(torch.where, sig=lambda condition, input=None, other=None, *, out=None: None)(_where_entry)


def clamp(b: GraphBuilder, x: TV, lo: Any, hi: Any) -> str:
    """``torch.clamp(x, lo, hi)`` = ``Min(Max(x, lo), hi)`` (module docstring)."""
    if lo is None and hi is None:
        raise Refusal("clamp without min or max", "torch requires at least one bound")
    for v in (lo, hi):
        if isinstance(v, float) and math.isnan(v):
            raise Refusal("clamp with a NaN bound")
    bounds = [v for v in (lo, hi) if v is not None]
    dtype = promoted(x, *bounds)
    xn = operand(b, x, dtype)
    if not any(isinstance(v, TV) for v in bounds):
        named = ["" if v is None else operand(b, v, dtype) for v in (lo, hi)]
        return b.op("Clip", [xn, *named])
    y = xn if lo is None else b.op("Max", [xn, operand(b, lo, dtype)])
    return y if hi is None else b.op("Min", [y, operand(b, hi, dtype)])


@TABLE.add(torch.clamp, torch.clip, "Tensor.clamp", "Tensor.clip",
           sig=lambda input, min=None, max=None, *, out=None: None)
def _clamp(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    return clamp(b, want_tensor(a["input"], "input"), a["min"], a["max"])


@TABLE.add(torch.clamp_min, "Tensor.clamp_min", sig=lambda input, min: None)
def _clamp_min(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    return clamp(b, want_tensor(a["input"], "input"), a["min"], None)


@TABLE.add(torch.clamp_max, "Tensor.clamp_max", sig=lambda input, max: None)
def _clamp_max(b: GraphBuilder, call: TorchCall, a: dict[str, Any]) -> str:
    return clamp(b, want_tensor(a["input"], "input"), None, a["max"])
