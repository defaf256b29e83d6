"""In-place tensor operations: exported as their out-of-place form only when that is the same program."""

from __future__ import annotations

from typing import Any

from seqgate.errors import Unsupported
from seqgate.export.torch.values import source_line

# Results that share memory with their input, so mutating them mutates the input too.
_ALIASING = {"getitem", "view", "reshape", "transpose", "permute", "squeeze", "unsqueeze", "expand",
             "flatten", "narrow", "select", "t", "view_as", "reshape_as", "expand_as", "chunk", "split",
             "unbind", "contiguous", "detach", "swapaxes", "swapdims", "Identity", "Dropout", "Dropout1d",
             "Dropout2d", "Dropout3d", "AlphaDropout", "FeatureAlphaDropout", "Flatten"}


def inplace_problems(gm: Any) -> list[Unsupported]:
    """In-place ops are exported as their out-of-place form only when that is the same program.

    That holds when the op's result is used and its input has no other live reader and is not
    a view of another tensor (``y = lin(x); y = y.relu_()``). Anything else (``y.relu_()`` as a
    statement, in-place on a slice) is refused: fx records the call, but the functional graph
    would not see the mutation.
    """
    out: list[Unsupported] = setitem_problems(gm)
    for n in gm.graph.nodes:
        what = _inplace_label(gm, n)
        if what is None:
            continue
        src = n.args[0] if n.args else None
        live = [u for u in getattr(src, "users", {}) if u.users or u is n or u.op == "output"]
        ok = (bool(n.users) and hasattr(src, "op") and live == [n]
              and _name_of(gm, src) not in _ALIASING)
        if not ok:
            line = source_line(n)
            out.append(Unsupported(f"{what}{' at ' + line if line else ''}",
                                   "in-place operation whose effect the exported graph would not see",
                                   "write it out of place and use the result (y = torch.relu(y))"))
    return out


def setitem_problems(gm: Any) -> list[Unsupported]:
    """``x[idx] = v`` is exported by rebinding ``x`` (``assign``), exact only when no other tensor
    shares x's memory: x must not be a forward() input or a view of another tensor, no view of x
    taken before the assignment may be read after it, and ``v`` must not be a view of x (torch then
    reads parts it has already overwritten: ``y[:, 1:3] = y[:, :2]`` copies y[:, 0] twice)."""
    import operator

    order = {n: i for i, n in enumerate(gm.graph.nodes)}
    out: list[Unsupported] = []
    for n in gm.graph.nodes:
        if n.op != "call_function" or n.target is not operator.setitem:
            continue
        x = n.args[0]
        why = None
        hint = "assign into a copy (y = x.clone(); y[idx] = v) and read y afterwards"
        if x.op == "placeholder":
            why = f"assigning into the forward() input {x.name!r} changes the caller's tensor"
        elif _is_view(gm, x):
            why = "assigning into a view changes the tensor it views too"
        else:
            stale = [u for u in x.users if u is not n and order[u] < order[n] and _is_view(gm, u)
                     and any(order[r] > order[n] for r in u.users)]
            if stale:
                why = f"{stale[0].name}, a view of the assigned tensor taken before, is read after it"
            elif _views_of(gm, n.args[2], x):
                why = ("the assigned value is a view of the same tensor: torch copies it element by element "
                       "while writing, so overlapping parts read values already overwritten")
                hint = "assign a copy of the value (y[idx] = y[a:b].clone())"
        if why:
            line = source_line(n)
            out.append(Unsupported(f"item assignment{' at ' + line if line else ''}", why, hint))
    return out


def _views_of(gm: Any, v: Any, x: Any) -> bool:
    """Is ``v`` ``x`` itself or a chain of views of it?"""
    while hasattr(v, "op"):
        if v is x:
            return True
        if not (_is_view(gm, v) and v.args):
            return False
        v = v.args[0]
    return False


def _is_view(gm: Any, n: Any) -> bool:
    """Does node ``n`` share memory with its input? (``x[[0, 2]]`` with a list or tensor copies.)"""
    import operator

    if n.op == "call_function" and n.target is operator.getitem:
        idx = n.args[1]
        if isinstance(idx, list) and all(isinstance(i, int) for i in idx):
            return False  # x[[0, 2]]: one list index
        items = idx if isinstance(idx, tuple | list) else (idx,)
        # a list, or a constant tensor (get_attr), among the items is an advanced index: a copy
        return not any(isinstance(it, list) or getattr(it, "op", None) == "get_attr" for it in items)
    return _name_of(gm, n) in _ALIASING


def _inplace_label(gm: Any, n: Any) -> str | None:
    from seqgate.export.torch.functions import function_label

    if n.op == "call_method" and n.target.endswith("_") and not n.target.startswith("__"):
        return f"Tensor.{n.target}"
    if n.op == "call_function":
        name = getattr(n.target, "__name__", "")
        if (name.endswith("_") and not name.startswith("__")) or n.kwargs.get("inplace") is True:
            return function_label(n.target)
    if n.op == "call_module" and getattr(gm.get_submodule(n.target), "inplace", False) is True:
        return f"{n.target} ({type(gm.get_submodule(n.target)).__name__}, inplace=True)"
    return None


def _name_of(gm: Any, n: Any) -> str:
    if n.op == "call_method":
        return str(n.target)
    if n.op == "call_module":
        return type(gm.get_submodule(n.target)).__name__
    return getattr(n.target, "__name__", "") if n.op == "call_function" else n.op
