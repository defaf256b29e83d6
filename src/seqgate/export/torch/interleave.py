"""Layers stepped inside one loop over time, handed on as whole sequences (structural only).

In ``for t: inp = x[:, t]; for l: h[l], c[l] = cell_l(inp, (h[l], c[l])); inp = h[l]`` layer l
at step t depends only on layer l at step t−1 and on layer l−1 at step t, so the loop equals
layer 0's loop over every step, then layer 1's loop over layer 0's stacked step outputs, and so
on. For a chain ``c_0 … c_{K−1}`` of one cell walking time along ``axis``, :func:`hand_on`
recognises that the k-th call ``d_k`` of ONE other cell takes as its input exactly the node at
one index path p of ``c_k`` (the same p every step, no op between). It then adds the collector
``S = torch.stack([o_0 … o_{K−1}], axis)`` (``o_k`` = path p of ``c_k``) and feeds ``d_k`` with
step k of S instead (``S[k]`` or ``S[:, k]``), which is the same value. The chain then has an
ordinary collector, and ``d_0 … d_{K−1}`` walk the time axis of S: both fold as usual. Anything
else read across layers stays for the chain's own checks to refuse.

S is placed after ``o_{K−1}`` while ``d_k`` (k < K−1) precede it, so the graph is out of order
until ``loopfold._rewrite`` replaces S by the loop leaf's sequence (inserted before ``c_0``);
the caller must fold or refuse right after.
"""

from __future__ import annotations

import operator
from typing import Any

Path = tuple[int, ...]


def _is_getitem(n: Any) -> bool:
    return n.op == "call_function" and n.target is operator.getitem


def path_of(n: Any, root: Any) -> Path | None:
    """Index path from ``root`` to ``n`` through getitem nodes, or None."""
    path: list[int] = []
    while n is not root:
        if not (hasattr(n, "op") and _is_getitem(n) and isinstance(n.args[1], int)):
            return None
        path.append(n.args[1])
        n = n.args[0]
    return tuple(reversed(path))


def readers(n: Any, path: Path = ()) -> list[tuple[Path, Any]]:
    """(path, node) for every reader of ``n``'s output that is not a getitem into it."""
    out: list[tuple[Path, Any]] = []
    for u in n.users:
        if _is_getitem(u) and u.args[0] is n and isinstance(u.args[1], int):
            out.extend(readers(u, (*path, u.args[1])))
        else:
            out.append((path, u))
    return out


def _node_at(call: Any, path: Path) -> Any:
    """The getitem node reached from ``call`` along ``path`` (``call`` for ``()``), or None."""
    n = call
    for i in path:
        nxt = [u for u in n.users if _is_getitem(u) and u.args[0] is n and u.args[1] == i]
        if len(nxt) != 1:
            return None
        n = nxt[0]
    return n


def _takers(call: Any, own: str, is_cell: Any, gm: Any) -> list[tuple[Path, Any]]:
    """(path, d) for every call d of another cell module whose input (args[0]) is ``call``'s
    output at path."""
    out = []
    for path, u in readers(call):
        if (u.op == "call_module" and str(u.target) != own and is_cell(gm.get_submodule(u.target))
                and u.args and path_of(u.args[0], call) == path):
            out.append((path, u))
    return out


def hand_on(gm: Any, calls: list[Any], axis: int, values: dict[Any, Any], is_cell: Any) -> bool:
    """Rewrite the hand-on from the chain ``calls`` to the next layer (module docstring); True
    when rewritten, False (graph untouched) when the chain's steps are not each the input of the
    same-step call of one other cell."""
    import torch

    own = str(calls[0].target)
    found = [_takers(c, own, is_cell, gm) for c in calls]
    if any(len(f) != 1 for f in found):
        return False
    path, target = found[0][0][0], found[0][0][1].target
    takers = [f[0][1] for f in found]
    if any(p != path or d.target != target for (p, d), in found) or len(set(takers)) != len(takers):
        return False
    items = [_node_at(c, path) for c in calls]
    if any(o is None or not isinstance(values.get(o), torch.Tensor) for o in items):
        return False
    g = gm.graph
    with g.inserting_after(items[-1]):
        seq = g.call_function(torch.stack, (items, axis))
    seq.meta = dict(items[-1].meta)
    values[seq] = torch.stack([values[o] for o in items], axis)
    for k, d in enumerate(takers):
        with g.inserting_before(d):
            step = g.call_function(operator.getitem, (seq, k if axis == 0 else (slice(None), k)))
        values[step] = values[items[k]]
        d.update_arg(0, step)
    return True
