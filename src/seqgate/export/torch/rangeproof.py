"""The walk behind a range-decided branch: one interval rule per op over the fx nodes (``intervals``).

:func:`prove` gives the node that ``bool()`` is asked of a :class:`~seqgate.export.torch.intervals.Span`
by following its inputs back (memoised, each node once) and returns a
:class:`~seqgate.export.torch.intervals.Proof` when the span proves the outcome for every input
in the declared domain. The domain, the sources, the rules and what "sound" means here are in
``intervals``' docstring; an op with no rule below is unknown, and so is all that follows it.

Size reads (:func:`size_read`, also used by ``branches``): a dim of a forward() input is taken
from its declared (or guessed) dims — exact when fixed, at least 1 when dynamic; any other size
read is its sample value, listed in ``Proof.sizes`` so that ``branches.compare`` proves it the
same at both sample sizes.
"""

from __future__ import annotations

import operator
from typing import Any

from seqgate.export.torch.intervals import (
    Attempt,
    Domain,
    Proof,
    Span,
    add,
    all_of,
    any_of,
    arange,
    both,
    bound_span,
    cast,
    clamp,
    compare,
    dim_span,
    dtype_kind,
    either,
    exact,
    fit,
    lower,
    mul,
    neg,
    negate,
    operator_names,
    outcome,
    sub,
    truth,
    upper,
)

SIZE_METHODS = ("size", "dim", "numel", "nelement", "ndimension")
SIZE_ATTRS = ("shape", "ndim")
_NOT_SIZE = object()
_SAME = ("cpu", "contiguous", "clone", "detach", "item", "squeeze", "unsqueeze", "view", "reshape",
         "flatten", "same")
_CASTS = ("long", "int", "short", "float", "double", "half", "bool", "to", "type", "cast")
_COMPARE = {"eq": "eq", "ne": "ne", "lt": "lt", "le": "le", "gt": "gt", "ge": "ge", "greater": "gt",
            "greater_equal": "ge", "less": "lt", "less_equal": "le", "not_equal": "ne"}


def size_read(n: Any) -> bool:
    """Is ``n`` a read of a tensor's sizes (``x.size(d)``, ``x.shape``, ``x.shape[d]``)?"""
    if n.op == "call_method" and n.target in SIZE_METHODS:
        return True
    if n.op == "call_function" and n.target is getattr and len(n.args) > 1:
        return n.args[1] in SIZE_ATTRS
    if n.op == "call_function" and n.target is operator.getitem and n.args:
        first = n.args[0]
        return hasattr(first, "op") and size_read(first)
    return False


def prove(node: Any, values: dict[Any, Any], domain: Domain) -> tuple[Proof | None, Attempt]:
    """The proved ``bool()`` of ``node``'s value, or None (with what the walk met, for the hint)."""
    import torch

    walk = _Walk(values, domain)
    span = walk.tensor_span(node)
    sample = values.get(node)
    one = not isinstance(sample, torch.Tensor) or sample.numel() == 1
    value = outcome(span) if one else None
    if value is None:
        return None, walk.attempt
    return Proof(value, tuple(walk.sizes), dict(walk.attempt.ranges), sorted(walk.dims)), walk.attempt


def _function_names() -> dict[Any, str]:
    """torch's functions by rule name, read from ``torch._C._VariableFunctions`` (the objects
    ``torch.full`` etc. are): ``loops`` swaps some ``torch.*`` attributes during a trace."""
    import torch

    fns = torch._C._VariableFunctions
    names = operator_names()
    for name in ("add", "sub", "mul", "neg", "min", "max", "amin", "amax", "minimum", "maximum",
                 "clamp", "clip", "any", "all", "logical_and", "logical_or", "logical_not", "full",
                 "full_like", "ones", "zeros", "ones_like", "zeros_like", "arange", *_COMPARE):
        names[getattr(fns, name)] = name
    names.update({fns.subtract: "sub", fns.multiply: "mul", fns.negative: "neg", getattr: "getattr"})
    return names


_NAMES: dict[Any, str] = {}


def _rule_name(n: Any) -> str | None:
    if n.op == "call_method":
        return str(n.target)
    if n.op != "call_function":
        return None
    if not _NAMES:
        _NAMES.update(_function_names())
    try:
        return _NAMES.get(n.target)
    except TypeError:  # an unhashable target
        return None


class _Walk:
    """Spans of fx nodes, memoised; records the sizes, ranges and dims it used."""

    def __init__(self, values: dict[Any, Any], domain: Domain) -> None:
        self.values, self.domain = values, domain
        self.memo: dict[Any, Any] = {}
        self.sizes: list[Any] = []
        self.dims: set[str] = set()
        self.attempt = Attempt()

    def span(self, a: Any) -> Any:
        """A Span, a tuple of them (``torch.max(x, dim)``), or None when unknown."""
        import torch.fx

        if isinstance(a, torch.fx.Node):
            if a not in self.memo:
                self.memo[a] = self._node(a)
            return self.memo[a]
        return exact(a)

    def tensor_span(self, a: Any) -> Span | None:
        s = self.span(a)
        return s if isinstance(s, Span) else None

    def sample(self, a: Any) -> Any:
        import torch.fx

        return self.values.get(a) if isinstance(a, torch.fx.Node) else a

    def _node(self, n: Any) -> Any:
        size = self._size(n)
        if size is not _NOT_SIZE:
            return size
        if n.op == "placeholder":
            return self._input(n)
        if n.op == "get_attr":
            return _constant(self.values.get(n))
        rule = _RULES.get(_rule_name(n) or "")
        if rule is None:
            return None
        out = rule(self, n)
        return out if isinstance(out, tuple) else fit(out, self.values.get(n))

    def _input(self, n: Any) -> Span | None:
        name = str(n.target)
        rng = self.domain.ranges.get(name)
        if rng is None:
            if dtype_kind(self.values.get(n))[0] == "int":
                self.attempt.unranged.append(name)
            return None
        self.attempt.ranges[name] = f"{rng[0]}..{rng[1]}"
        self.dims.update(str(b) for b in rng if isinstance(b, str))
        dims = self.domain.dims.get(name, ())
        filled = all(dim_span(d).lo >= 1 for d in dims)
        s = bound_span(*rng)
        return Span(s.lo, s.hi, True, s.mag, filled)

    def _input_dims(self, x: Any) -> tuple[int | str, ...] | None:
        if hasattr(x, "op") and x.op == "placeholder":
            return self.domain.dims.get(str(x.target))
        return None

    def _dim(self, dims: tuple[int | str, ...], d: Any) -> Span | None:
        if isinstance(d, bool) or not isinstance(d, int) or not -len(dims) <= d < len(dims):
            return None
        dim = dims[d]
        if isinstance(dim, str):
            self.dims.add(dim)
        return dim_span(dim)

    def _size(self, n: Any) -> Any:
        """A size read (module docstring), or ``_NOT_SIZE``."""
        if not size_read(n):
            return _NOT_SIZE
        found = self._input_size(n)
        if found is not _NOT_SIZE:
            return found
        v = self.values.get(n)
        if isinstance(v, bool) or not isinstance(v, int):
            return None
        self.sizes.append(v)
        return exact(v)

    def _input_size(self, n: Any) -> Any:
        """``x.size(d)``, ``x.shape[d]``, ``x.size()[d]``, ``x.dim()``, ``x.ndim`` of a forward() input."""
        first = n.args[0] if n.args else None
        if n.op == "call_method":
            dims = self._input_dims(first)
            if dims is None:
                return _NOT_SIZE
            if n.target in ("dim", "ndimension"):
                return exact(len(dims))
            if n.target == "size" and (len(n.args) > 1 or "dim" in n.kwargs):
                return self._dim(dims, n.args[1] if len(n.args) > 1 else n.kwargs["dim"])
            return _NOT_SIZE
        if n.target is getattr:
            dims = self._input_dims(first)
            return exact(len(dims)) if dims is not None and n.args[1] == "ndim" else _NOT_SIZE
        whole = first  # getitem(x.shape or x.size(), d)
        base = whole.args[0] if whole.args else None
        if whole.op == "call_method" and (whole.target != "size" or len(whole.args) > 1):
            return _NOT_SIZE
        if whole.op == "call_function" and whole.args[1:2] != ("shape",):
            return _NOT_SIZE
        dims = self._input_dims(base)
        return _NOT_SIZE if dims is None else self._dim(dims, n.args[1])


def _constant(v: Any) -> Span | None:
    """A module buffer or parameter: fixed for the export, so its own smallest and largest value."""
    import torch

    if not isinstance(v, torch.Tensor) or v.numel() == 0 or v.is_complex():
        return None
    t = v.detach().double()
    if bool(torch.isnan(t).any()):
        return None
    whole = v.dtype == torch.bool or not v.is_floating_point() or bool((t == t.round()).all())
    return Span.of(float(t.min()), float(t.max()), whole=whole)


# ----- rules: fn(walk, node) -> Span | tuple | None ----------------------------------------------
def _arg(n: Any, i: int, key: str, default: Any = None) -> Any:
    return n.args[i] if len(n.args) > i else n.kwargs.get(key, default)


def _same(w: _Walk, n: Any) -> Any:
    x = w.tensor_span(n.args[0])
    if x is None:
        return None
    return Span(x.lo, x.hi, x.whole, x.mag, True) if n.target == "item" else x


def _cast(w: _Walk, n: Any) -> Any:
    x = w.tensor_span(n.args[0]) if n.args else None
    return None if x is None else cast(x, w.values.get(n))


def _arith(w: _Walk, n: Any) -> Any:
    name = _rule_name(n)
    if n.kwargs.get("alpha", 1) != 1:
        return None
    a = w.tensor_span(n.args[0]) if n.args else None
    if name == "neg":
        return None if a is None else neg(a)
    b = w.tensor_span(_arg(n, 1, "other"))
    if a is None or b is None:
        return None
    return {"add": add, "sub": sub, "mul": mul}[name or ""](a, b)


def _compare(w: _Walk, n: Any) -> Any:
    a, b = w.tensor_span(n.args[0]), w.tensor_span(_arg(n, 1, "other"))
    return None if a is None or b is None else compare(_COMPARE[_rule_name(n) or ""], a, b)


def _logic(w: _Walk, n: Any) -> Any:
    """``&``/``|``/``~`` on booleans only (on integers they are bitwise); ``logical_*`` on any."""
    name = _rule_name(n) or ""
    spans = [w.tensor_span(a) for a in n.args[:2]]
    if any(s is None for s in spans) or not spans:
        return None
    if name in ("and", "or", "invert"):
        if any(dtype_kind(w.sample(a))[0] != "bool" for a in n.args[:2]):
            return None
    else:
        spans = [truth(s) for s in spans]  # type: ignore[arg-type]
    if name in ("invert", "logical_not"):
        return negate(spans[0])  # type: ignore[arg-type]
    if len(spans) < 2:
        return None
    return (both if name in ("and", "logical_and") else either)(*spans)


def _reduce(w: _Walk, n: Any) -> Any:
    """min/max/amin/amax of all elements or along a dim; min/max of two tensors element-wise."""
    import torch

    name = _rule_name(n) or ""
    x = w.tensor_span(n.args[0]) if n.args else None
    other = _arg(n, 1, "other" if name in ("minimum", "maximum") else "dim")
    if x is None:
        return None
    if name in ("minimum", "maximum") or isinstance(w.sample(other), torch.Tensor):
        y = w.tensor_span(other)
        return None if y is None else (lower if name in ("min", "minimum") else upper)(x, y)
    if other is None or name in ("amin", "amax"):
        return Span(x.lo, x.hi, x.whole, x.mag, True if other is None else x.filled)
    return (x, None)  # torch.max(x, dim) -> (values, indices)


def _clamp(w: _Walk, n: Any) -> Any:
    x = w.tensor_span(n.args[0]) if n.args else None
    bounds = [_arg(n, 1, "min"), _arg(n, 2, "max")]
    spans = [None if b is None else w.tensor_span(b) for b in bounds]
    if x is None or any(b is not None and s is None for b, s in zip(bounds, spans, strict=True)):
        return None
    return clamp(x, spans[0], spans[1])


def _any_all(w: _Walk, n: Any) -> Any:
    x = w.tensor_span(n.args[0]) if n.args else None
    if x is None:
        return None
    whole = _arg(n, 1, "dim") is None
    out = (any_of if _rule_name(n) == "any" else all_of)(x, whole)
    return Span(out.lo, out.hi, True, 1, True if whole else x.filled)


def _sizes_filled(w: _Walk, size: Any) -> bool:
    parts = list(size) if isinstance(size, list | tuple) else [size]
    spans = [w.tensor_span(p) for p in parts]
    return all(s is not None and s.lo >= 1 for s in spans)


def _full(w: _Walk, n: Any) -> Any:
    """``full(size, v)``, ``ones(*size)``, ``zeros(*size)`` and their ``*_like`` forms."""
    name = _rule_name(n) or ""
    like = name.endswith("_like")
    fill: Any = {"ones": 1, "zeros": 0}.get(name.removesuffix("_like"))
    if name.startswith("full"):
        fill = _arg(n, 1, "fill_value")
    v = w.tensor_span(fill)
    if v is None:
        return None
    if like:
        x = w.tensor_span(n.args[0]) if n.args else None
        filled = x is not None and x.filled
    else:
        size = n.args[0] if len(n.args) == 1 else n.args or n.kwargs.get("size", ())
        filled = _sizes_filled(w, _arg(n, 0, "size") if name == "full" else size)
    return Span(v.lo, v.hi, v.whole, v.mag, filled)


def _arange(w: _Walk, n: Any) -> Any:
    args = list(n.args)
    if len(args) == 1 and "end" not in n.kwargs:
        args = [0, *args]
    start, end, step = (args + [n.kwargs.get(k) for k in ("start", "end", "step")][len(args):] + [1])[:3]
    s, e = w.tensor_span(0 if start is None else start), w.tensor_span(end)
    if s is None or e is None or (step is not None and step != 1):
        return None
    return arange(s, e)


def _item(w: _Walk, n: Any) -> Any:
    """``x[idx]`` selects elements of ``x``; ``out[0]`` / ``out.values`` of ``torch.max(x, dim)``."""
    base = w.span(n.args[0])
    key = n.args[1] if len(n.args) > 1 else None
    if isinstance(base, tuple):
        idx = {"values": 0, "indices": 1}.get(key, key) if isinstance(key, str) else key
        return base[idx] if isinstance(idx, int) and not isinstance(idx, bool) and 0 <= idx < 2 else None
    if not isinstance(base, Span) or _rule_name(n) == "getattr":
        return None
    return Span(base.lo, base.hi, base.whole, base.mag, False)


_RULES: dict[str, Any] = {
    **{k: _same for k in _SAME}, **{k: _cast for k in _CASTS},
    **{k: _arith for k in ("add", "sub", "mul", "neg")}, **{k: _compare for k in _COMPARE},
    **{k: _logic for k in ("and", "or", "invert", "logical_and", "logical_or", "logical_not")},
    **{k: _reduce for k in ("min", "max", "amin", "amax", "minimum", "maximum")},
    **{k: _full for k in ("full", "full_like", "ones", "zeros", "ones_like", "zeros_like")},
    "clamp": _clamp, "clip": _clamp, "any": _any_all, "all": _any_all, "arange": _arange,
    "getitem": _item, "getattr": _item,
}
