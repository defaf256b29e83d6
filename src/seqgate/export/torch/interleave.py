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
from dataclasses import dataclass
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


def time_step(n: Any) -> tuple[Any, int, int] | None:
    """(X, axis, k) when ``n`` is step k of X along axis 0 or 1, else None."""
    import torch

    if not hasattr(n, "op"):
        return None
    if _is_getitem(n):
        src, idx = n.args
        if isinstance(idx, int) and getattr(src, "op", "") in ("call_method", "call_function") and (
                src.target in ("unbind", torch.unbind)):
            axis = src.args[1] if len(src.args) > 1 else src.kwargs.get("dim", 0)
            return (src.args[0], axis, idx) if axis in (0, 1) else None
        if isinstance(idx, int):
            return src, 0, idx
        if isinstance(idx, tuple):
            full = slice(None, None, None)
            ints = [(a, i) for a, i in enumerate(idx) if isinstance(i, int)]
            rest_ok = all(i == full or i is Ellipsis for i in idx if not isinstance(i, int))
            if len(ints) == 1 and rest_ok and ints[0][0] in (0, 1) and Ellipsis not in idx[:ints[0][0]]:
                return src, ints[0][0], ints[0][1]
        return None
    if n.target in ("select", torch.select) and len(n.args) == 3:
        _, axis, k = n.args
        if axis in (0, 1) and isinstance(k, int):
            return n.args[0], axis, k
    return None


def _node_at(call: Any, path: Path) -> Any:
    """The getitem node reached from ``call`` along ``path`` (``call`` for ``()``), or None."""
    n = call
    for i in path:
        nxt = [u for u in n.users if _is_getitem(u) and u.args[0] is n and u.args[1] == i]
        if len(nxt) != 1:
            return None
        n = nxt[0]
    return n


@dataclass
class _Ctx:
    """Where step views may come from: whole tensors ``values``-known before ``first`` with
    ``steps`` items along ``axis``."""
    gm: Any
    values: dict[Any, Any]
    pos: dict[Any, int]
    first: Any
    axis: int
    steps: int


def _identity_arg(gm: Any, n: Any) -> Any:
    """The input of a dropout in eval mode or an nn.Identity (identity maps), else None."""
    import torch.nn.functional as F
    from torch import nn

    if n.op == "call_module" and len(n.args) == 1 and not n.kwargs:
        m = gm.get_submodule(n.target)
        if isinstance(m, nn.Identity) or (isinstance(m, nn.Dropout) and not m.training):
            return n.args[0]
    if n.op == "call_function" and n.target is F.dropout and n.args:
        training = n.args[2] if len(n.args) > 2 else n.kwargs.get("training", True)
        return n.args[0] if training is False else None
    return None


def _elementwise(n: Any) -> bool:
    import torch

    if n.kwargs:
        return False
    if n.op == "call_method":
        return n.target in ("add", "sub", "mul")
    return n.op == "call_function" and n.target in (
        operator.add, operator.sub, operator.mul, torch.add, torch.sub, torch.mul)


def _step_form(ctx: _Ctx, n: Any, k: int, leaves: dict[Any, str]) -> Any:
    """``n`` as an expression of step k of whole tensors (structure with the tensors' nodes), or
    None. Allowed: step k of a tensor along ``ctx.axis`` (``x[:, k]`` …), a node in ``leaves``,
    int/float constants, +, −, × of same-shape operands, eval dropout / identity."""
    import torch

    if not hasattr(n, "op"):
        return ("const", n) if isinstance(n, int | float) else None
    if n in leaves:
        return ("leaf", leaves[n])
    ts = time_step(n)
    if ts is not None:
        q, ax, i = ts
        v = ctx.values.get(q)
        ok = (i == k and ax == ctx.axis and isinstance(v, torch.Tensor) and v.dim() >= 2
              and int(v.shape[ax]) == ctx.steps and ctx.pos.get(q, len(ctx.pos)) < ctx.pos[ctx.first])
        return ("seq", q) if ok else None
    inner = _identity_arg(ctx.gm, n)
    if inner is not None:
        return _step_form(ctx, inner, k, leaves)
    out = ctx.values.get(n)
    if not _elementwise(n) or not isinstance(out, torch.Tensor):
        return None
    if any(hasattr(a, "op") and getattr(ctx.values.get(a), "shape", None) != out.shape for a in n.args):
        return None  # broadcasting between steps could differ from broadcasting the sequences
    args = tuple(_step_form(ctx, a, k, leaves) for a in n.args)
    return None if any(a is None for a in args) else ("op", n.op, n.target, args)


def _build(g: Any, form: Any, values: dict[Any, Any]) -> Any:
    """Nodes computing ``form`` on the whole tensors (same ops, each element as in its step)."""
    if form[0] in ("seq", "const"):
        return form[1]
    _, op, target, args = form
    built = tuple(_build(g, a, values) for a in args)
    node = g.create_node(op, target, built)
    vals = [values[a] if hasattr(a, "op") else a for a in built]
    values[node] = getattr(vals[0], target)(*vals[1:]) if op == "call_method" else target(*vals)
    return node


def _step_of(g: Any, seq: Any, k: int, axis: int, before: Any) -> Any:
    with g.inserting_before(before):
        return g.call_function(operator.getitem, (seq, k if axis == 0 else (slice(None), k)))


def lift_inputs(gm: Any, calls: list[Any], values: dict[Any, Any], wanted: Any) -> bool:
    """When every call k's input is one elementwise expression of step k of whole tensors (the
    same expression each step, not a bare step), compute it once on the whole tensors before
    the first call and feed call k its step k; True when rewritten. ``wanted(axis)`` is asked
    before anything changes."""
    if any(not c.args for c in calls) or time_step(calls[0].args[0]) is not None:
        return False
    pos = {n: i for i, n in enumerate(gm.graph.nodes)}
    for axis in (1, 0):
        ctx = _Ctx(gm, values, pos, calls[0], axis, len(calls))
        forms = [_step_form(ctx, c.args[0], k, {}) for k, c in enumerate(calls)]
        if forms[0] is not None and all(f == forms[0] for f in forms) and wanted(axis):
            break
    else:
        return False
    g = gm.graph
    with g.inserting_before(calls[0]):
        seq = _build(g, forms[0], values)
    for k, c in enumerate(calls):
        step = _step_of(g, seq, k, axis, c)
        values[step] = values[c.args[0]]
        c.update_arg(0, step)
    return True


def _takes(gm: Any, u: Any, call: Any, path: Path, k: int, is_cell: Any) -> bool:
    """``u`` is the k-th call of another cell module (same step) and its input (args[0]) is
    ``call``'s output at path."""
    if not (u.op == "call_module" and u.target != call.target and is_cell(gm.get_submodule(u.target))
            and bool(u.args) and path_of(u.args[0], call) == path):
        return False
    same = [n for n in gm.graph.nodes if n.op == "call_module" and n.target == u.target]
    return k < len(same) and same[k] is u


@dataclass
class HandOn:
    """Per step k the readers of ``items[k]`` (path ``path`` of call k) to feed step k of S."""
    items: list[Any]
    takers: list[list[Any]]
    axis: int


def hand_plan(gm: Any, calls: list[Any], axis: int, values: dict[Any, Any], is_cell: Any) -> HandOn | None:
    """The hand-on of the chain ``calls`` (module docstring), or None. Every reader of call k's
    output other than call k+1 must be the input of another cell or an elementwise expression of
    step k values (the last step's output may also be read by anything else)."""
    import torch

    ctx = _Ctx(gm, values, {n: i for i, n in enumerate(gm.graph.nodes)}, calls[0], axis, len(calls))
    takers: list[list[Any]] = []
    paths: set[Path] = set()
    for k, c in enumerate(calls):
        nxt = calls[k + 1] if k + 1 < len(calls) else None
        takers.append([])
        for path, u in readers(c):
            if u is nxt:
                continue
            if _takes(gm, u, c, path, k, is_cell) or _step_form(ctx, u, k, {_node_at(c, path): "out"}):
                takers[-1].append(u)
                paths.add(path)
            elif nxt is not None:
                return None
    if len(paths) != 1 or not any(takers[:-1]):
        return None
    items = [_node_at(c, next(iter(paths))) for c in calls]
    if any(o is None or not isinstance(values.get(o), torch.Tensor) for o in items):
        return None
    return HandOn(items, takers, axis)


def hand_on(gm: Any, plan: HandOn, values: dict[Any, Any]) -> None:
    """Add the collector S of the chain's step outputs and feed every taker step k of S."""
    import torch

    g, items = gm.graph, plan.items
    with g.inserting_after(items[-1]):
        seq = g.call_function(torch.stack, (items, plan.axis))
    seq.meta = dict(items[-1].meta)
    values[seq] = torch.stack([values[o] for o in items], plan.axis)
    for k, us in enumerate(plan.takers):
        for u in us:
            step = _step_of(g, seq, k, plan.axis, u)
            values[step] = values[items[k]]
            u.replace_input_with(items[k], step)


def lift_stacks(gm: Any, values: dict[Any, Any]) -> None:
    """Replace ``torch.stack([e_0 … e_{K−1}], a)`` (a ∈ {0, 1}) whose items are one elementwise
    expression of step k of whole tensors along a (not bare steps) by that expression on the
    whole tensors: what is left of a loop's step outputs after its cells were folded."""
    import torch

    g = gm.graph
    for n in list(g.nodes):
        if not (n.op == "call_function" and n.target is torch.stack and n.args and set(n.kwargs) <= {"dim"}):
            continue
        items, axis = n.args[0], n.args[1] if len(n.args) > 1 else n.kwargs.get("dim", 0)
        if axis not in (0, 1) or not isinstance(items, list | tuple) or not items or any(
                not hasattr(i, "op") or time_step(i) is not None for i in items):
            continue
        ctx = _Ctx(gm, values, {m: i for i, m in enumerate(g.nodes)}, n, axis, len(items))
        forms = [_step_form(ctx, e, k, {}) for k, e in enumerate(items)]
        if forms[0] is None or any(f != forms[0] for f in forms):
            continue
        with g.inserting_before(n):
            whole = _build(g, forms[0], values)
        n.replace_all_uses_with(whole)
        g.erase_node(n)
    g.eliminate_dead_code()
