"""Value ranges (intervals) of traced values: a Python branch decided by the declared input ranges.

``if lengths.max() == 0`` decides on tensor data, so ``branches.decide`` refuses it — unless the
outcome is the same for every input the export accepts. With ``--input lengths:batch:int64=1..time``
every value of ``lengths`` lies in ``[1, time]``, so ``lengths.max() == 0`` is False for every
valid input and the branch is not a choice at all. This module proves such outcomes.

Contract:

- :func:`prove` follows the fx nodes behind a traced value and gives every node a
  :class:`Span`: an interval ``[lo, hi]`` holding *every element* of the node's value for every
  input in the declared domain. It returns the outcome of ``bool()`` only when the span proves it
  (``0`` outside the span: True; the span is exactly ``[0, 0]``: False); else None, and the branch
  stays refused. The sample value is never used to decide; it only gives the dtype of each node
  (fixed for the export) and is checked against the proved outcome.
- The domain (:class:`Domain`): an input with a declared range ``LOW..HIGH`` lies in
  ``[LOW, HIGH]``. A bound naming a dim (``time``, ``time-1``) and a size read of a forward()
  input's dynamic dim take the dim as **at least 1 and unbounded above**: a window has at least
  one step and a batch at least one window. A fixed dim (an integer in ``--input``) is exact.
  A size read of any other tensor is taken at its sample value and listed in the decision, so
  ``branches.compare`` proves it equal at both sample sizes (as for any size branch).
- Sources: inputs with a declared range, size reads, Python numbers, module buffers, ``torch.full``
  / ``ones`` / ``zeros`` (and ``*_like``) of a known fill value, ``torch.arange``. Rules (exact
  interval arithmetic, each the obvious sound one): min/max/amin/amax (whole or along a dim),
  minimum/maximum, clamp/clip, add/sub/neg/mul (all four sign cases of a product), casts
  (``.long()``, ``.int()``, ``.float()``, ``.to(dtype)``, ``.bool()``), ``.cpu()``, ``.item()``,
  ``int()``/``float()``, indexing (selects elements), comparisons (``==``, ``!=``, ``<``, ``<=``,
  ``>``, ``>=``: a span within ``[0, 1]``), ``~``/``&``/``|`` and ``torch.logical_*`` on booleans,
  ``any``/``all``. Every other op is unknown, and so is everything computed from it.
- Machine numbers: a floating-point result takes its bounds rounded to its precision (rounding
  to nearest is monotone, so a value above ``lo`` rounds to at least ``lo``'s rounding). Integer
  arithmetic must not wrap: each span carries a bound on ``|value|`` with every dynamic dim taken
  as below ``2**30`` (no window has that many steps or rows), and an integer result whose bound
  leaves its dtype is unknown.
- ``any``/``all`` need to know whether a tensor can be empty (``any`` of nothing is False): a span
  is *filled* when its tensor has at least one element for every valid input (inputs with no
  zero-size dim, element-wise ops of filled tensors, reductions, ``full`` of sizes ≥ 1).
"""

from __future__ import annotations

import math
import operator
from dataclasses import dataclass, field, replace
from typing import Any

from seqgate.util.dims import split_dim

INF = math.inf
DIM_LIMIT = 2**30  # a dynamic dim is below this, for the wrap-around bound only (module docstring)
_INT_LIMITS = {"int8": 2**7, "int16": 2**15, "int32": 2**31, "int64": 2**63}


@dataclass(frozen=True)
class Span:
    """Every element lies in ``[lo, hi]`` (bounds may be ±inf); ``whole``: every element is an
    integer; ``mag``: a bound on ``|element|`` with dynamic dims below ``DIM_LIMIT``; ``filled``:
    the tensor is never empty."""

    lo: float
    hi: float
    whole: bool = True
    mag: float = 0.0
    filled: bool = True

    @staticmethod
    def of(lo: float, hi: float, whole: bool = True, filled: bool = True, mag: float | None = None) -> Span:
        m = max(abs(lo), abs(hi)) if mag is None else mag
        return Span(lo, hi, whole, m, filled)


TRUE, FALSE, EITHER = Span.of(1, 1), Span.of(0, 0), Span.of(0, 1)


def exact(v: Any) -> Span | None:
    """The span of a Python number (None for anything else, NaN included)."""
    if isinstance(v, bool | int):
        return Span.of(int(v), int(v))
    if isinstance(v, float) and not math.isnan(v):
        return Span.of(v, v, whole=v.is_integer() if math.isfinite(v) else False)
    return None


def dim_span(dim: int | str) -> Span:
    """A size: a fixed dim exactly, a dynamic one (``time``, ``time-1``) at least ``1 + offset``."""
    if isinstance(dim, int):
        return Span.of(dim, dim)
    _, offset = split_dim(dim)
    return Span.of(max(0, 1 + offset), INF, mag=DIM_LIMIT + abs(offset))


def bound_span(low: int | str, high: int | str) -> Span:
    """A declared range ``LOW..HIGH`` whose bounds are ints or dims (:func:`dim_span`)."""
    lo, hi = dim_span(low) if isinstance(low, str) else Span.of(low, low), dim_span(high) if isinstance(
        high, str) else Span.of(high, high)
    return Span.of(lo.lo, hi.hi, mag=max(lo.mag, hi.mag))


@dataclass
class Domain:
    """What the export declares about forward()'s inputs: value ranges and dims, by parameter."""

    ranges: dict[str, tuple[int | str, int | str]] = field(default_factory=dict)
    dims: dict[str, tuple[int | str, ...]] = field(default_factory=dict)


@dataclass
class Proof:
    """A proved ``bool()``: its value, the sample sizes it read (compared across the two traces),
    the declared ranges it used (``{"lengths": "1..time"}``) and the dynamic dims taken as ≥ 1."""

    value: bool
    sizes: tuple[Any, ...]
    ranges: dict[str, str]
    dims: list[str]


@dataclass
class Attempt:
    """What :func:`prove` met: integer inputs without a declared range (for the refusal's hint)
    and ranges it used without deciding."""

    unranged: list[str] = field(default_factory=list)
    ranges: dict[str, str] = field(default_factory=dict)


# ----- machine numbers -------------------------------------------------------------------------
def dtype_kind(sample: Any) -> tuple[str, int | None, Any]:
    """``(kind, int limit, numpy float type)`` of a sample value: kind is bool/int/float/other."""
    import numpy as np
    import torch

    if isinstance(sample, bool):
        return "bool", None, None
    if isinstance(sample, int):
        return "int", None, None  # a Python int does not wrap
    if isinstance(sample, float):
        return "float", None, np.float64
    if isinstance(sample, torch.Tensor):
        if sample.dtype == torch.bool:
            return "bool", None, None
        name = str(sample.dtype).removeprefix("torch.")
        if name in _INT_LIMITS:
            return "int", _INT_LIMITS[name], None
        if sample.dtype in (torch.float32, torch.float64, torch.float16):
            return "float", None, {"float32": np.float32, "float64": np.float64, "float16": np.float16}[name]
    return "other", None, None


def fit(s: Span | None, sample: Any) -> Span | None:
    """``s`` as the sample's dtype holds it (module docstring): booleans within [0, 1], integers
    whole and within their dtype, floating-point bounds rounded to its precision."""
    if s is None:
        return None
    kind, limit, ftype = dtype_kind(sample)
    if kind == "bool":
        return s if 0 <= s.lo and s.hi <= 1 and s.whole else None
    if kind == "int":
        if not s.whole or (limit is not None and s.mag > limit - 1):
            return None
        return s
    if kind == "float":
        lo, hi = float(ftype(s.lo)), float(ftype(s.hi))
        return replace(s, lo=lo, hi=hi, mag=max(s.mag, abs(lo) if math.isfinite(lo) else s.mag))
    return None


def truth(s: Span) -> Span:
    """``x != 0`` element-wise (Python's truth of a number, ``.bool()``)."""
    if s.lo > 0 or s.hi < 0:
        return replace(TRUE, filled=s.filled)
    if s.lo == s.hi == 0:
        return replace(FALSE, filled=s.filled)
    return replace(EITHER, filled=s.filled)


def outcome(s: Span | None) -> bool | None:
    """``bool()`` of a one-element value in ``s`` when the span proves it, else None."""
    if s is None:
        return None
    t = truth(s)
    return None if t.lo != t.hi else bool(t.lo)


# ----- arithmetic ----------------------------------------------------------------------------
def _mul0(a: float, b: float) -> float:
    """A product of bounds; ``0 · inf`` is 0 (the values themselves are finite)."""
    return 0.0 if a == 0 or b == 0 else a * b


def add(a: Span, b: Span) -> Span:
    return Span(a.lo + b.lo, a.hi + b.hi, a.whole and b.whole, a.mag + b.mag, a.filled and b.filled)


def neg(a: Span) -> Span:
    return Span(-a.hi, -a.lo, a.whole, a.mag, a.filled)


def sub(a: Span, b: Span) -> Span:
    return add(a, neg(b))


def mul(a: Span, b: Span) -> Span:
    """All four corner products (signs may flip the order); the true product lies between them."""
    corners = [_mul0(x, y) for x in (a.lo, a.hi) for y in (b.lo, b.hi)]
    return Span(min(corners), max(corners), a.whole and b.whole, _mul0(a.mag, b.mag), a.filled and b.filled)


def lower(a: Span, b: Span) -> Span:
    """``minimum(a, b)`` element-wise."""
    return Span(min(a.lo, b.lo), min(a.hi, b.hi), a.whole and b.whole, max(a.mag, b.mag), a.filled and b.filled)


def upper(a: Span, b: Span) -> Span:
    """``maximum(a, b)`` element-wise."""
    return Span(max(a.lo, b.lo), max(a.hi, b.hi), a.whole and b.whole, max(a.mag, b.mag), a.filled and b.filled)


def compare(op: str, a: Span, b: Span) -> Span:
    """``a OP b`` element-wise as a boolean span: TRUE/FALSE when every pair agrees, else EITHER."""
    if op in ("gt", "ge"):
        a, b, op = b, a, {"gt": "lt", "ge": "le"}[op]
    filled = a.filled and b.filled
    if op == "lt":
        out = TRUE if a.hi < b.lo else FALSE if a.lo >= b.hi else EITHER
    elif op == "le":
        out = TRUE if a.hi <= b.lo else FALSE if a.lo > b.hi else EITHER
    else:
        same = a.lo == a.hi == b.lo == b.hi
        apart = a.hi < b.lo or b.hi < a.lo
        out = TRUE if same else FALSE if apart else EITHER
        if op == "ne":
            out = Span.of(1 - out.hi, 1 - out.lo)
    return replace(out, filled=filled)


def both(a: Span, b: Span) -> Span:
    """Logical and of two booleans."""
    return Span.of(min(a.lo, b.lo), min(a.hi, b.hi), filled=a.filled and b.filled)


def either(a: Span, b: Span) -> Span:
    """Logical or of two booleans."""
    return Span.of(max(a.lo, b.lo), max(a.hi, b.hi), filled=a.filled and b.filled)


def negate(a: Span) -> Span:
    """Logical not of a boolean."""
    return Span.of(1 - a.hi, 1 - a.lo, filled=a.filled)


def any_of(a: Span, whole_tensor: bool) -> Span:
    """``torch.any`` of a tensor whose elements' truth is ``a`` (False for an empty tensor)."""
    t = truth(a)
    if t.hi == 0:
        return FALSE
    return TRUE if t.lo == 1 and a.filled and whole_tensor else EITHER


def all_of(a: Span, whole_tensor: bool) -> Span:
    """``torch.all`` (True for an empty tensor)."""
    t = truth(a)
    if t.lo == 1:
        return TRUE
    return FALSE if t.hi == 0 and a.filled and whole_tensor else EITHER


def clamp(a: Span, low: Span | None, high: Span | None) -> Span:
    """``clamp(a, low, high)`` = ``minimum(maximum(a, low), high)`` (PyTorch applies min first)."""
    out = upper(a, low) if low is not None else a
    return lower(out, high) if high is not None else out


def arange(start: Span, end: Span) -> Span | None:
    """``arange(start, end)`` with step 1: integers from ``start`` up to ``end - 1``."""
    if not (start.whole and end.whole):
        return None
    return Span(start.lo, end.hi - 1, True, max(start.mag, end.mag), start.hi < end.lo)


def cast(a: Span, sample: Any) -> Span | None:
    """A conversion to the sample's dtype: to bool by truth, to an integer by truncation toward
    zero (monotone, so the bounds truncate), to floating point by rounding (:func:`fit`)."""
    kind = dtype_kind(sample)[0]
    if kind == "bool":
        return truth(a)
    if kind == "int" and not a.whole:
        lo = math.trunc(a.lo) if math.isfinite(a.lo) else a.lo
        hi = math.trunc(a.hi) if math.isfinite(a.hi) else a.hi
        return fit(Span(lo, hi, True, a.mag, a.filled), sample)
    return fit(a, sample)


def operator_names() -> dict[Any, str]:
    """Python operators as rule names (``rangeproof`` adds torch's functions)."""
    return {operator.add: "add", operator.sub: "sub", operator.mul: "mul", operator.neg: "neg",
            operator.pos: "same", operator.eq: "eq", operator.ne: "ne", operator.lt: "lt",
            operator.le: "le", operator.gt: "gt", operator.ge: "ge", operator.and_: "and",
            operator.or_: "or", operator.invert: "invert", operator.getitem: "getitem",
            int: "cast", float: "cast", bool: "cast"}
