"""The ``--input`` option: what a user declares about one forward() input.

Syntax (one option per input, repeatable)::

    NAME:DIM,DIM,...[:DTYPE][=LOW..HIGH]

- ``NAME`` is a forward() parameter (``x``), or ``PARAM.KEY`` for one tensor of a dict or
  dataclass parameter (``batch.encoder_cont``; ``structured.py`` builds the structure);
- ``DIM`` is a positive integer, a symbolic name (``batch``, ``time``, any identifier) or a
  symbolic name plus or minus an integer (``time+6``, ``time-1``: ``seqgate.util.dims``);
  no dims at all (``scale:``) is a scalar;
- ``DTYPE`` is ``float32`` (the default), ``int64``, ``int32`` or ``bool``;
- ``=LOW..HIGH`` is the inclusive value range that sample runs and synthetic windows draw
  integers from; each bound is an integer or a symbolic dim (``1..time``: at most the
  window's length), and only integer inputs take one (a range without a dtype means int64).

Every malformed option is a one-paragraph error (exit 2) naming the option as written.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

from seqgate.errors import BadInputError
from seqgate.util.dims import split_dim

DTYPES = ("float32", "int64", "int32", "bool")
INTEGER_DTYPES = ("int64", "int32")
SYNTAX = ("NAME:DIM,DIM,...[:DTYPE][=LOW..HIGH], e.g. x:batch,time,8 or "
          "lengths:batch:int64=1..time or batch.encoder_cont:batch,24,3")
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z_][A-Za-z0-9_]*)?$")
_SYMBOL = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_BOUND = re.compile(r"^-?[0-9]+$")

Bound = int | str


@dataclass(frozen=True)
class Declared:
    """One ``--input``: dims, and the dtype and value range when given."""

    name: str
    dims: tuple[int | str, ...]
    dtype: str | None = None  # None: float32, or what the consuming module needs (Embedding ids)
    low: Bound | None = None
    high: Bound | None = None

    @property
    def param(self) -> str:
        """The forward() parameter this input belongs to (``batch`` of ``batch.encoder_cont``)."""
        return self.name.split(".", 1)[0]

    @property
    def key(self) -> str | None:
        """The dict key or dataclass field (``encoder_cont``), None for a plain parameter."""
        return self.name.split(".", 1)[1] if "." in self.name else None

    @property
    def ranged(self) -> bool:
        return self.low is not None


def _bad(text: str, why: str) -> BadInputError:
    return BadInputError(f"--input {text!r}: {why} The option reads {SYNTAX}.")


def _dim(text: str, d: str) -> int | str:
    if d.isdigit() and int(d) > 0:
        return int(d)
    symbol, offset = split_dim(d)
    if _SYMBOL.match(symbol) and not symbol.isdigit():
        return d.replace(" ", "") if offset else symbol
    raise _bad(text, f"dim {d!r} is neither a positive integer, a symbolic name such as batch or time, "
                     f"nor a name plus or minus an integer such as time+6.")


def _bound(text: str, b: str) -> Bound:
    b = b.strip()
    if _BOUND.match(b):
        return int(b)
    symbol, offset = split_dim(b)
    if _SYMBOL.match(symbol):
        return b.replace(" ", "") if offset else symbol
    raise _bad(text, f"range bound {b!r} is neither an integer nor a symbolic dim such as time.")


def parse_one(text: str) -> Declared:
    """One option value → :class:`Declared` (module docstring); exit 2 when malformed."""
    head, eq, rng = text.partition("=")
    parts = head.split(":")
    name = parts[0].strip()
    if len(parts) not in (2, 3) or not _NAME.match(name):
        raise _bad(text, "expected NAME:DIM,DIM,... with NAME a forward() parameter (or PARAM.KEY for "
                         "a tensor of a dict or dataclass parameter), then at most one more :DTYPE.")
    dims_text = parts[1]
    dims = tuple(_dim(text, d.strip()) for d in dims_text.split(",")) if dims_text.strip() else ()
    dtype = parts[2].strip() if len(parts) == 3 else None
    if dtype is not None and dtype not in DTYPES:
        raise _bad(text, f"dtype {dtype!r} is not one of {', '.join(DTYPES)}.")
    low = high = None
    if eq:
        lo_text, dots, hi_text = rng.partition("..")
        if not dots or not lo_text.strip() or not hi_text.strip():
            raise _bad(text, f"value range {rng!r} should read LOW..HIGH, e.g. 1..time or 0..11.")
        dtype = dtype or "int64"
        if dtype not in INTEGER_DTYPES:
            raise _bad(text, f"a value range is for integer inputs (int64, int32), not {dtype}.")
        low, high = _bound(text, lo_text), _bound(text, hi_text)
        if isinstance(low, int) and isinstance(high, int) and low > high:
            raise _bad(text, f"the range {low}..{high} is empty (LOW is above HIGH).")
    if dtype == "bool":
        low, high = 0, 1
    return Declared(name, dims, dtype, low, high)


def parse_inputs(texts: list[str] | None) -> dict[str, Declared]:
    """Every ``--input`` by name; exit 2 on a malformed option, a name given twice, or a range
    bound that names a symbol no input has (``batch`` and ``time`` are always known)."""
    out: dict[str, Declared] = {}
    for text in texts or []:
        d = parse_one(text)
        if d.name in out:
            raise BadInputError(f"--input names {d.name!r} twice; give each input once.")
        out[d.name] = d
    for d in out.values():
        if d.key is not None and d.param in out:
            raise BadInputError(f"--input names both {d.param!r} and {d.name!r}; a parameter is either "
                                f"one tensor or a dict/dataclass of named tensors, not both.")
    symbols = {"batch", "time"} | {split_dim(x)[0] for d in out.values() for x in d.dims if isinstance(x, str)}
    for d in out.values():
        for b in (d.low, d.high):
            if isinstance(b, str) and split_dim(b)[0] not in symbols:
                raise BadInputError(
                    f"--input {d.name}: the range bound {b!r} names no dim of any input (known: "
                    f"{', '.join(sorted(symbols))}); use an integer or one of those dims.")
    return out



def range_metadata(specs: list[Any], onnx_name: dict[str, str]) -> dict[str, str]:
    """``seqgate.input_ranges`` (``seqgate.onnxfile.input_meta``) for every input with a declared
    value range; {} when none has one."""
    import json

    from seqgate.onnxfile.input_meta import RANGES_KEY

    entries = {onnx_name.get(s.name, s.name): {"low": s.low, "high": s.high}
               for s in specs if getattr(s, "low", None) is not None}
    return {RANGES_KEY: json.dumps(entries, sort_keys=True)} if entries else {}
