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
    out: list[Unsupported] = []
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
