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
  that choice changes with the numbers, so no single graph is right — unless the declared value
  ranges of the inputs (``--input lengths:batch:int64=1..time``) prove the outcome for every
  input in them (``rangeproof``, ``intervals``): ``if lengths.max() == 0`` is then False for
  every valid input and is decided so, recorded in ``Decisions.ranged`` (written to
  ``seqgate.range_decided_branches``, printed by ``seqgate export``) and compared across the
  two traces like any other decision.
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

import traceback
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from seqgate.errors import Unsupported, UnsupportedModelError


class BranchError(UnsupportedModelError):
    """A Python branch or size that cannot be fixed for the export (exit 3)."""


@dataclass
class Decisions:
    """What one trace decided: ``(where, kind, value, sizes read)`` in trace order, and the
    branches on tensor data that the declared value ranges decided (``ranged``)."""

    records: list[tuple[str, str, Any, tuple[Any, ...]]] = field(default_factory=list)
    ranged: list[dict[str, Any]] = field(default_factory=list)  # branches the value ranges decided


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


def sizes_behind(node: Any, values: dict[Any, Any]) -> tuple[Any, ...] | None:
    """The size values ``node`` is computed from, or None when it reads tensor data."""
    import torch

    from seqgate.export.torch.rangeproof import size_read

    sizes: list[Any] = []
    stack, seen = [node], set()
    while stack:
        n = stack.pop()
        if n in seen:
            continue
        seen.add(n)
        if size_read(n):
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
    """``bool(proxy)`` from its sample value when it reads only sizes, from the declared value
    ranges when they prove it (``rangeproof``), recorded; refuses any other choice on tensor data."""
    where = user_line()
    sizes = sizes_behind(proxy.node, tracer.values)
    if sizes is None:
        return _by_range(tracer, proxy, decisions, where)
    value = bool(tracer.values[proxy.node])
    decisions.records.append((where, "branch", value, sizes))
    return value


def _by_range(tracer: Any, proxy: Any, decisions: Decisions, where: str) -> bool:
    """A branch on tensor data decided for every input in the declared domain, or refused."""
    from seqgate.errors import InternalError
    from seqgate.export.torch.rangeproof import prove

    proof, attempt = prove(proxy.node, tracer.values, tracer.domain)
    if proof is None:
        raise DataDependent(Unsupported(where, DATA_BRANCH, data_hint(attempt, tracer.domain)))
    if bool(tracer.values[proxy.node]) != proof.value:
        raise InternalError(f"{where}: the declared value ranges prove this branch {proof.value}, but the "
                            f"sample run took it as {not proof.value}; this is a bug in seqgate.")
    decisions.records.append((where, "branch", proof.value, proof.sizes))
    entry = {"where": where, "outcome": proof.value, "ranges": proof.ranges, "dims": proof.dims}
    if entry not in decisions.ranged:
        decisions.ranged.append(entry)
    return proof.value


DATA_BRANCH = ("a Python if/while/assert (control flow) decides on tensor data, so the graph would "
               "change with the numbers")


def data_hint(attempt: Any, domain: Any) -> str:
    """What to do about a data branch: tensor operations, or a declared range that decides it."""
    hint = ("express the choice with tensor operations (torch.where, masks), or decide on a "
            "constructor argument")
    if attempt.unranged:
        name = attempt.unranged[0]
        dims = ",".join(str(d) for d in domain.dims.get(name, ("batch",)))
        hint += (f"; if it only guards inputs that never occur, declare the value range of {name} "
                 f"(--input {name}:{dims}:int64=LOW..HIGH) so that seqgate can prove the outcome for "
                 f"every input in it")
    elif attempt.ranges:
        shown = ", ".join(f"{k} in {v}" for k, v in attempt.ranges.items())
        hint += f"; the declared value ranges ({shown}) do not decide it"
    return hint


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


RANGED_KEY = "seqgate.range_decided_branches"
RANGED = "seqgate_range_decided"  # key of the list in a traced GraphModule's ``meta``


def ranged_metadata(entries: list[dict[str, Any]]) -> dict[str, str]:
    """``{RANGED_KEY: JSON list}`` of the branches the value ranges decided (each ``{"where":
    "file.py:LINE: `code`", "outcome": bool, "ranges": {input: "LOW..HIGH"}, "dims": [dim, ...]}``,
    dims being the dynamic dims taken as at least 1), else nothing."""
    import json

    return {RANGED_KEY: json.dumps(entries)} if entries else {}


def read_ranged(model: Any) -> list[dict[str, Any]]:
    """The range-decided branches an exported ModelProto records (empty when none)."""
    import json

    for p in model.metadata_props:
        if p.key == RANGED_KEY:
            return [dict(x) for x in json.loads(p.value)]
    return []


def ranged_note(entry: dict[str, Any]) -> str:
    """One line for ``seqgate export``: the branch, its outcome and the ranges that decided it."""
    from seqgate.util.dims import split_dim

    ranges = entry.get("ranges", {})
    named = {split_dim(b)[0] for v in ranges.values() for b in v.split("..")}  # said by the range
    why = [f"{k} in {v}" for k, v in ranges.items()]
    why += [f"{d} >= 1" for d in entry.get("dims", []) if split_dim(d)[0] not in named]
    return (f"branch decided by the declared value ranges ({', '.join(why) or 'fixed sizes'}: the value "
            f"it tests is {entry['outcome']} for every input in them; the ONNX file is right only inside "
            f"them): {entry['where']}")
