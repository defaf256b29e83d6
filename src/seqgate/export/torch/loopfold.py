"""Fold an unrolled loop of cell calls into one :class:`CellLoop` leaf (structural proof only).

A *chain* is a run of calls ``c_0 … c_{K−1}`` of one cell module where every ``c_{k+1}`` reads
its state only from ``c_k``'s output, through the same index paths each step (``(h, c) =
cell(x_t, (h, c))`` reads paths (0,) and (1,); ``h = cell(x_t, h)`` reads path ()). A chain is
a loop over time, and is folded, when all of this holds:

- ``c_k``'s input is step k of one tensor X along axis a ∈ {0, 1}: ``X[:, k]``, ``X[k]``,
  ``X.select(a, k)`` or element k of ``X.unbind(a)``, for k = 0 … K−1 in order — or step K−1−k
  for every k (``for t in reversed(range(T))``: ``CellLoop.reverse``, ONNX's reverse direction) —
  and K is X's size along a in the traced sample;
- the outputs of ``c_k`` (k < K−1) are read only by ``c_{k+1}`` and by one collector of every
  step's output: ``torch.stack([o_0 … o_{K−1}], dim)`` or ``torch.cat([o_k.unsqueeze(d) …], d)``
  (o_k the same index path of every ``c_k``), or the same items in reverse call order
  (``outs.reverse()``: ``CellLoop.flipped``); ``c_{K−1}``'s outputs may be read by anything.

The chain becomes ``loop = CellLoop(cell)(X, *initial state leaves)``; ``loop[0]`` replaces the
collector and ``loop[1]`` the last call's output (same structure as the cell's output). A chain
whose inputs are time steps of X but which breaks another rule is refused with what differs;
any other chain stays unrolled (a decoder fed its own prediction).
"""

from __future__ import annotations

import operator
from dataclasses import dataclass
from typing import Any

from seqgate.errors import Unsupported, UnsupportedModelError
from seqgate.export.torch.interleave import (
    hand_on,
    hand_plan,
    lift_inputs,
    lift_stacks,
    path_of,
    readers,
    time_step,
)

Path = tuple[int, ...]


def _cell_loop_class() -> type:
    import torch
    from torch import nn

    class CellLoop(nn.Module):
        """``cell`` run over ``x`` along ``axis``; returns (stacked step outputs or None, last output).

        ``template["first"]`` is the structure of step 0's state arguments with ``("init", j)``
        for the j-th initial leaf; ``template["later"]`` that of later steps with ``("path", p)``
        for path p into the previous step's output.
        """

        def __init__(self, cell: Any, cell_name: str, axis: int, template: Any, seq_path: Path | None,
                     seq_dim: int, calls: tuple[int, int], reverse: bool = False,
                     flipped: bool = False) -> None:
            super().__init__()
            self.reverse = reverse  # the loop runs from the last step to the first
            self.flipped = flipped  # the collected outputs are stacked in reverse call order
            self.cell = cell
            self.cell_name = cell_name
            self.axis = axis
            self.template = template
            self.seq_path = seq_path
            self.seq_dim = seq_dim
            self.calls = calls

        def forward(self, x: Any, *init: Any) -> Any:
            out: Any = None
            seq = []
            steps = range(x.size(self.axis))
            for k, t in enumerate(reversed(steps) if self.reverse else steps):
                state = fill_dims(self.template["first" if k == 0 else "later"], init, out)
                out = self.cell(x.select(self.axis, t), *state)
                if self.seq_path is not None:
                    seq.append(_at(out, self.seq_path))
            if self.flipped:
                seq.reverse()
            return (torch.stack(seq, self.seq_dim) if seq else None), out

    return CellLoop


_CLASS: list[type] = []


def cell_loop_class() -> type:
    """The :class:`CellLoop` module class (made once, after torch is imported)."""
    if not _CLASS:
        _CLASS.append(_cell_loop_class())
    return _CLASS[0]


def fill_dims(template: Any, init: Any, prev: Any) -> Any:
    if isinstance(template, tuple) and len(template) == 2 and template[0] in ("init", "path"):
        return init[template[1]] if template[0] == "init" and init is not None else (
            _at(prev, template[1]) if template[0] == "path" else None)
    if isinstance(template, list):
        return [fill_dims(t, init, prev) for t in template]
    if isinstance(template, tuple):
        return tuple(fill_dims(t, init, prev) for t in template)
    return template


def _at(v: Any, path: Path) -> Any:
    for i in path:
        v = v[i]
    return v


# ----- recognising the parts of a chain -------------------------------------------------------
def _is_getitem(n: Any) -> bool:
    return n.op == "call_function" and n.target is operator.getitem


def _leaves(a: Any, out: list[Any]) -> Any:
    """Replace fx nodes in ``a`` by ("leaf", j) and collect them."""
    if hasattr(a, "op"):
        out.append(a)
        return ("leaf", len(out) - 1)
    if isinstance(a, list):
        return [_leaves(x, out) for x in a]
    if isinstance(a, tuple):
        return tuple(_leaves(x, out) for x in a)
    return a


def _state_args(call: Any) -> Any:
    if call.kwargs:
        return None  # keyword state arguments: not a recognised loop form
    return tuple(call.args[1:])


@dataclass
class _Chain:
    calls: list[Any]
    paths: list[Path]  # state leaf j of c_{k+1} is paths[j] into c_k
    template_args: Any  # state args of c_k (k ≥ 1) with leaves numbered


def _chains(calls: list[Any]) -> list[_Chain]:
    """Split the calls of one cell into maximal chains (module docstring)."""
    chains: list[_Chain] = []
    cur: _Chain | None = None
    for c in calls:
        leaves: list[Any] = []
        shape = _leaves(_state_args(c), leaves)
        paths = [path_of(leaf, cur.calls[-1]) for leaf in leaves] if cur else []
        if (cur is not None and leaves and all(p is not None for p in paths)
                and (len(cur.calls) == 1 or (paths == cur.paths and shape == cur.template_args))):
            if len(cur.calls) == 1:
                cur.paths, cur.template_args = paths, shape  # type: ignore[assignment]
            cur.calls.append(c)
            continue
        cur = _Chain([c], [], None)
        chains.append(cur)
    return chains


# ----- folding ---------------------------------------------------------------------------------
def fold_loops(gm: Any, values: dict[Any, Any], is_cell: Any, label: str) -> None:
    """Fold every chain that is a loop over time (module docstring); refuse a near miss."""
    by_target: dict[str, list[Any]] = {}
    for n in gm.graph.nodes:
        if n.op == "call_module" and is_cell(gm.get_submodule(n.target)):
            by_target.setdefault(str(n.target), []).append(n)
    problems: list[Unsupported] = []
    for target, calls in by_target.items():
        folded = 0
        for chain in _chains(calls):
            steps = [time_step(c.args[0]) if c.args else None for c in chain.calls]
            order = _walks_time(steps, values)
            if order is None:
                if not lift_inputs(gm, chain.calls, values, lambda a, ch=chain: _blocker(ch) is None or (
                        hand_plan(gm, ch.calls, a, values, is_cell) is not None)):
                    continue
                steps, order = [time_step(c.args[0]) for c in chain.calls], "forward"
            why = _blocker(chain)
            plan = None if why is None else hand_plan(gm, chain.calls, steps[0][1], values, is_cell)  # type: ignore[index]
            if plan is not None:
                hand_on(gm, plan, values)
                why = _blocker(chain)  # the next layer now reads the collected sequence
            if why is not None:
                problems.append(Unsupported(_where(gm, chain.calls[0]), why, _HINT))
                continue
            folded += 1
            if folded > 1:
                problems.append(Unsupported(_where(gm, chain.calls[0]), "the cell runs in two loops over time",
                                            "give each loop its own cell module"))
                continue
            before = calls.index(chain.calls[0])
            after = len(calls) - 1 - calls.index(chain.calls[-1])
            _rewrite(gm, target, chain, (*steps[0][:2], order), (before, after), values)  # type: ignore[index]
    if problems:
        raise UnsupportedModelError(label, problems)
    lift_stacks(gm, values)
    gm.graph.lint()
    gm.recompile()


_HINT = ("write the step as `h, c = cell(x[:, t], (h, c))` (or `h = cell(x[:, t], h)`), collect the "
         "outputs with `outs.append(h)` and `torch.stack(outs, 1)`, and apply other layers after the loop")


def _walks_time(steps: list[Any], values: dict[Any, Any]) -> str | None:
    """"forward" when call k reads step k of one tensor's time axis, "reverse" when it reads step
    T−1−k (``for t in reversed(range(T))``), each of the T steps once; else None."""
    if len(steps) < 2 or any(s is None for s in steps):
        return None
    x, axis, n = steps[0][0], steps[0][1], len(steps)
    if any(s[0] is not x or s[1] != axis for s in steps):
        return None
    v = values.get(x)
    if v is None or not hasattr(v, "shape") or v.dim() < 2 or int(v.shape[axis]) != n:
        return None
    if all(s[2] == k for k, s in enumerate(steps)):
        return "forward"
    return "reverse" if all(s[2] == n - 1 - k for k, s in enumerate(steps)) else None


def _where(gm: Any, n: Any) -> str:
    from seqgate.export.torch.values import source_line

    line = source_line(n)
    return f"{n.target} ({type(gm.get_submodule(n.target)).__name__}) in a loop over time" + (
        f" at {line}" if line else "")


def _collector(chain: _Chain) -> tuple[Any, Path, int, list[Any], bool] | str | None:
    """The node that collects every step's output: (node, path, dim, unsqueeze nodes, whether the
    items are in reverse call order — a reverse loop's list turned back with ``outs.reverse()``)."""
    import torch

    first = [(p, u) for p, u in readers(chain.calls[0]) if u is not chain.calls[1]]
    if not first:
        return None
    if len(first) > 1:
        return "more than one"
    path, u = first[0]
    unsq: list[Any] = []
    if (u.op, u.target) in (("call_method", "unsqueeze"), ("call_function", torch.unsqueeze)):
        d = u.args[1] if len(u.args) > 1 else u.kwargs.get("dim")
        if len(u.users) != 1:
            return "more than one"
        unsq, u = [u], next(iter(u.users))
        want = torch.cat
    else:
        d, want = None, torch.stack
    if u.op != "call_function" or u.target not in (want, torch.stack, torch.cat) or u.target is not want:
        return f"{getattr(u.target, '__name__', u.target)}"
    items = u.args[0] if u.args else u.kwargs.get("tensors")
    dim = u.args[1] if len(u.args) > 1 else u.kwargs.get("dim", 0)
    if not isinstance(items, list | tuple) or len(items) != len(chain.calls) or (d is not None and d != dim):
        return "a collection that is not every step's output"
    flipped = len(items) > 1 and _item_call(items[0], d) is chain.calls[-1]
    calls = list(reversed(chain.calls)) if flipped else chain.calls
    for item, c in zip(items, calls, strict=True):
        node = item
        if d is not None:
            if not (hasattr(item, "op") and item.args and d in (*item.args[1:2], item.kwargs.get("dim"))):
                return "a collection that is not every step's output"
            node = item.args[0]
        if path_of(node, c) != path:
            return "a collection that is not every step's output"
    return u, path, int(dim), list(items) if d is not None else unsq, flipped


def _item_call(item: Any, d: Any) -> Any:
    """The cell call an item of the collection comes from (through its getitem/unsqueeze)."""
    node = item.args[0] if d is not None and hasattr(item, "args") and item.args else item
    while hasattr(node, "op") and _is_getitem(node):
        node = node.args[0]
    return node


def _blocker(chain: _Chain) -> str | None:
    """Why a chain over the time axis cannot be one op (None when it can)."""
    col = _collector(chain)
    if isinstance(col, str):
        return f"a step's output is read by {col} inside the loop"
    allowed = {chain.calls[k + 1] for k in range(len(chain.calls) - 1)}
    if col is not None:
        allowed |= {col[0], *col[3]}
    for k, c in enumerate(chain.calls[:-1]):
        for _, u in readers(c):
            if u not in allowed:
                return f"the state of step {k} is also read by {u.name} ({u.target}) inside the loop"
    return None


def _rewrite(gm: Any, target: str, chain: _Chain, x_axis: tuple[Any, int, str], calls: tuple[int, int],
             values: dict[Any, Any]) -> None:
    """Replace the chain by the loop leaf; the leaf's items take the sample values of what they
    replace, so a later loop over the collected sequence (a second layer) is recognised too."""
    x, axis, order = x_axis
    c0, last = chain.calls[0], chain.calls[-1]
    init: list[Any] = []
    template0 = _leaves(_state_args(c0), init)
    template = _template(template0, chain, values.get(c0))
    col = _collector(chain)
    seq_path, seq_dim = (col[1], col[2]) if isinstance(col, tuple) else (None, 0)
    flipped = isinstance(col, tuple) and col[4]
    cls = cell_loop_class()
    name = f"{target.replace('.', '_')}_loop"
    gm.add_submodule(name, cls(gm.get_submodule(target), target, axis, template, seq_path, seq_dim, calls,
                               order == "reverse", flipped))
    g = gm.graph
    with g.inserting_before(c0):
        loop = g.call_module(name, (x, *init))
        loop.meta = dict(c0.meta)
        seq = g.call_function(operator.getitem, (loop, 0))
        fin = g.call_function(operator.getitem, (loop, 1))
    values[fin] = values.get(last)
    if isinstance(col, tuple):
        values[seq] = values.get(col[0])
        col[0].replace_all_uses_with(seq)
        g.erase_node(col[0])
        for u in col[3]:
            g.erase_node(u)
    last.replace_all_uses_with(fin)
    for c in reversed(chain.calls):
        _erase_tree(g, c)
    g.eliminate_dead_code()


def _template(template0: Any, chain: _Chain, out0: Any) -> Any:
    """Step-0 argument structure with ("init", j) leaves, and later steps' with ("path", p) leaves;
    a path to a tuple of the output (``state = cell(x[:, t], state)`` with ``(h, c)`` returned) is
    spelled out item by item from the sample output ``out0``, so every carried leaf is a tensor."""
    def conv(t: Any) -> Any:
        if isinstance(t, tuple) and len(t) == 2 and t[0] == "leaf":
            return ("init", t[1])
        if isinstance(t, list | tuple):
            return type(t)(conv(x) for x in t)
        return t

    def later(t: Any) -> Any:
        if isinstance(t, tuple) and len(t) == 2 and t[0] == "leaf":
            return _spelled(chain.paths[t[1]], out0)
        if isinstance(t, list | tuple):
            return type(t)(later(x) for x in t)
        return t

    return {"first": conv(template0), "later": later(chain.template_args)}


def _spelled(path: Path, out: Any) -> Any:
    v = out
    for i in path:
        v = v[i] if isinstance(v, tuple | list) and i < len(v) else None
    if isinstance(v, tuple | list):
        return type(v)(_spelled((*path, i), out) for i in range(len(v)))
    return ("path", path)


def _erase_tree(g: Any, n: Any) -> None:
    for u in list(n.users):
        if _is_getitem(u):
            _erase_tree(g, u)
    if not n.users:
        g.erase_node(n)


def canonical(gm: Any) -> list[Any]:
    """The graph as comparable tuples: op, target, arguments with nodes as positions."""
    import torch

    pos = {n: i for i, n in enumerate(gm.graph.nodes)}

    def arg(a: Any) -> Any:
        if hasattr(a, "op"):
            return ("node", pos[a])
        if isinstance(a, list | tuple):
            return (type(a).__name__, *[arg(x) for x in a])
        if isinstance(a, dict):
            return ("dict", *sorted((k, arg(v)) for k, v in a.items()))
        if isinstance(a, slice):
            return ("slice", arg(a.start), arg(a.stop), arg(a.step))
        return repr(a)

    out = []
    for n in gm.graph.nodes:
        target = n.target if isinstance(n.target, str) else getattr(n.target, "__qualname__", repr(n.target))
        extra: Any = None
        if n.op == "get_attr":
            obj: Any = gm
            for part in str(n.target).split("."):
                obj = getattr(obj, part)
            extra = tuple(obj.shape) if isinstance(obj, torch.Tensor) else repr(obj)
        out.append((n.op, target, arg(n.args), arg(n.kwargs), extra))
    return out
