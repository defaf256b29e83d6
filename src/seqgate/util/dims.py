"""Symbolic dims written as expressions: ``time+6``, ``time-1`` (one symbol plus or minus an int).

ONNX has no dim arithmetic: a dim_param is a name. seqgate writes an input dim declared as
``NAME+K`` / ``NAME-K`` under exactly that name, and every reader (synthetic windows, the
profiler, recordings, the cost model) reads it back here as "the size of ``NAME``, plus K".
"""

from __future__ import annotations

import re
from collections.abc import Mapping

_EXPR = re.compile(r"^([A-Za-z_][A-Za-z0-9_]*)\s*([+-])\s*([0-9]+)$")


def split_dim(dim: str) -> tuple[str, int]:
    """``"time+6"`` → ``("time", 6)``; ``"time-1"`` → ``("time", -1)``; ``"time"`` → ``("time", 0)``.

    Any other string (an unnamed dim such as ``output_dim2``) is its own symbol with offset 0.
    """
    m = _EXPR.match(dim.strip())
    if m is None:
        return dim, 0
    offset = int(m.group(3))
    return m.group(1), offset if m.group(2) == "+" else -offset


def dim_text(symbol: str, offset: int) -> str:
    """The canonical name of ``symbol + offset`` (``time+6``, ``time-1``, ``time``)."""
    if offset == 0:
        return symbol
    return f"{symbol}{'+' if offset > 0 else '-'}{abs(offset)}"


def resolve(dim: int | str, sizes: Mapping[str, int]) -> int | None:
    """The size of ``dim`` given the sizes of the plain symbols (None when its symbol is unknown)."""
    if isinstance(dim, int):
        return dim
    symbol, offset = split_dim(dim)
    if symbol not in sizes:
        return None
    return int(sizes[symbol]) + offset
