"""Python branches and sizes of a PyTorch ``forward`` decided at trace time, with the proof it is safe.

Real forwards branch on sizes: ``if x.dim() == 2``, ``if x.shape[1] > 1``,
``if layer_input.size(-1) == self.hidden_size``, ``n = len(inputs)``. ``torch.fx`` refuses
them (a traced value decides Python control flow). The value-carrying tracer of ``loops``
knows every size on its sample input, so such a branch can be decided while tracing —
exactly when every size it reads is fixed for the export.

Contract:

- ``bool(v)`` on a traced value is decided by :func:`decide`. The fx nodes behind ``v`` are
  followed back to their *size reads* (``x.size(d)``, ``x.shape[d]``, ``x.dim()``,
  ``x.numel()``). Reaching a tensor's data instead (``if x.sum() > 0``) is refused (exit 3):
  that choice changes with the numbers, so no single graph is right.
- Each decision is recorded with the sizes it read; sizes turned into Python numbers
  (``int(x.size(2))``, ``len(x)``) are recorded too (:func:`record_number`).
- The forward is traced at two sample sizes (``loops.loop_trace``). :func:`compare` refuses
  when a decision, or one of the sizes it read, differs between the two traces: the branch
  depends on a dynamic dim (batch, time). The message names the dim and how to fix it for the
  export (``--input x:batch,24,3``). Where no loop over a recurrent cell is folded, a size used
  as a Python number must also be equal in both traces. The two traced graphs must then be
  the same graph (``loops``), so the branch taken is the same at both sizes.
"""

from __future__ import annotations

import operator
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from seqgate.errors import Unsupported, UnsupportedModelError

_SIZE_METHODS = ("size", "dim", "numel", "nelement", "ndimension")
_SIZE_ATTRS = ("shape", "ndim")


class BranchError(UnsupportedModelError):
    """A Python branch or size that cannot be fixed for the export (exit 3)."""


@dataclass
class Decisions:
    """What one trace decided: ``(where, kind, value, sizes read)`` in trace order."""

    records: list[tuple[str, str, Any, tuple[Any, ...]]] = field(default_factory=list)


class DataDependent(Exception):
    """``bool()`` of a value computed from tensor data; carries the refusal."""

    def __init__(self, unsupported: Unsupported) -> None:
        super().__init__(unsupported.what)
        self.unsupported = unsupported


def user_line() -> str:
    """``file.py:LINE: `code``` of the innermost frame outside torch and seqgate's export."""
    import torch

    skip = (str(Path(torch.__file__).parent), str(Path(__file__).parents[1]))
    frames = [f for f in traceback.extract_stack() if not f.filename.startswith(skip)]
    if not frames:
        return "forward"
    f = frames[-1]
    return f"{Path(f.filename).name}:{f.lineno}: `{(f.line or '').strip()}`"


def _size_read(n: Any) -> bool:
    """Is ``n`` a read of a tensor's sizes (``x.size(d)``, ``x.shape``, ``x.shape[d]``)?"""
    if n.op == "call_method" and n.target in _SIZE_METHODS:
        return True
    if n.op == "call_function" and n.target is getattr and len(n.args) > 1:
        return n.args[1] in _SIZE_ATTRS
    if n.op == "call_function" and n.target is operator.getitem and n.args:
        first = n.args[0]
        return hasattr(first, "op") and _size_read(first)
    return False


def sizes_behind(node: Any, values: dict[Any, Any]) -> tuple[Any, ...] | None:
    """The size values ``node`` is computed from, or None when it reads tensor data."""
    import torch

    sizes: list[Any] = []
    stack, seen = [node], set()
    while stack:
        n = stack.pop()
        if n in seen:
            continue
        seen.add(n)
        if _size_read(n):
            # x.shape[1] is met before x.shape: only the element read counts, not the whole
            # shape (which holds the batch size)
            sizes.append(_plain(values.get(n)))
            continue
        if isinstance(values.get(n), torch.Tensor):
            return None
        stack.extend(n.all_input_nodes)
    return tuple(sizes)


def _plain(v: Any) -> Any:
    import torch

    return tuple(int(d) for d in v) if isinstance(v, torch.Size) else v


def decide(tracer: Any, proxy: Any, decisions: Decisions) -> bool:
    """``bool(proxy)`` from its sample value, recorded; refuses a choice made on tensor data."""
    where = user_line()
    sizes = sizes_behind(proxy.node, tracer.values)
    if sizes is None:
        raise DataDependent(Unsupported(
            where, "a Python if/while/assert (control flow) decides on tensor data, so the graph "
                   "would change with the numbers",
            "express the choice with tensor operations (torch.where, masks), or decide on a "
            "constructor argument"))
    value = bool(tracer.values[proxy.node])
    decisions.records.append((where, "branch", value, sizes))
    return value


def record_number(decisions: Decisions, value: Any) -> None:
    """A size turned into a Python number (``int(x.size(2))``, ``len(x)``)."""
    decisions.records.append((user_line(), "number", value, (value,)))


def compare(a: Decisions, b: Decisions, sa: dict[str, int], sb: dict[str, int],
            dims: dict[str, tuple[int | str, ...]], numbers: bool, label: str) -> None:
    """Refuse (exit 3) when trace A and trace B decided differently or read different sizes."""
    for ra, rb in zip(a.records, b.records, strict=False):
        if ra[1] == "number" and not numbers:
            continue
        if ra[:2] == rb[:2] and ra[2:] == rb[2:]:
            continue
        symbol = _symbol(ra[3], rb[3], sa, sb) or _symbol((ra[2],), (rb[2],), sa, sb)
        what = ("a Python branch depends on" if ra[1] == "branch"
                else "a size used as a Python number is") + f" a dynamic dim{_named(symbol)}: " \
            f"{_shown(ra)} at sample size {_at(sa, symbol)}, {_shown(rb)} at {_at(sb, symbol)}"
        hint = fix_hint(symbol, dims)
        if ra[1] == "number":
            hint = ("a Python loop over time is exported only when each step runs a recurrent cell "
                    "(nn.LSTMCell, a cell module of your own); otherwise " + hint)
        raise BranchError(label, [Unsupported(ra[0], what, hint)])


def _symbol(xa: tuple[Any, ...], xb: tuple[Any, ...], sa: dict[str, int], sb: dict[str, int]) -> str | None:
    """The symbolic dim whose two sample sizes appear where the two traces differ."""
    for va, vb in zip(xa, xb, strict=False):
        for s in sa:
            if _has(va, sa[s]) and _has(vb, sb.get(s)) and va != vb:
                return s
    return None


def _has(v: Any, size: Any) -> bool:
    return v == size or (isinstance(v, tuple) and size in v)


def _named(symbol: str | None) -> str:
    return f" (`{symbol}`)" if symbol else ""


def _at(s: dict[str, int], symbol: str | None) -> str:
    return f"{symbol}={s[symbol]}" if symbol else "the other"


def _shown(r: tuple[Any, ...]) -> str:
    sizes = ", ".join(str(x) for x in r[3])
    return f"{r[2]} (sizes read: {sizes})" if r[1] == "branch" else str(r[2])


def fix_hint(symbol: str | None, dims: dict[str, tuple[int | str, ...]]) -> str:
    """How to fix the dim for the export: ``--input x:batch,24,3`` with that dim a number."""
    example = next(((n, d) for n, d in dims.items() if symbol in d), None) if symbol else None
    if example is None:
        name, d = next(iter(dims.items()), ("x", ("batch", "time", 3)))
        symbol = symbol or "the dim"
    else:
        name, d = example
    fixed = ",".join("24" if x == symbol else str(x) for x in d)
    return (f"fix {symbol} for the export with --input {name}:{fixed} (24 standing for the size "
            f"you export for), or decide on a constructor argument instead")
