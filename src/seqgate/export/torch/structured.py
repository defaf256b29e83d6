"""Forward parameters that hold several tensors (a dict, a dataclass, a tuple or list).

An ONNX graph input is one tensor; seqgate maps each tensor parameter of ``forward`` to one
input. A parameter that holds several tensors is refused (exit 3) with a message that says
what seqgate saw — the parameter and its type annotation, or the keys/fields the forward
reads from it — and shows a six-line wrapper module whose ``forward`` takes the tensors one
by one and rebuilds the structure.

Two checks: :func:`refuse_annotated` before tracing (the annotation names a dict, mapping,
dataclass, tuple or list), :func:`refuse_read_as_structure` after tracing (the traced graph
reads ``x["key"]`` or ``x.field`` of an unannotated parameter).
"""

from __future__ import annotations

import dataclasses
import inspect
import operator
from typing import Any

from seqgate.errors import Unsupported, UnsupportedModelError

_CONTAINERS = ("dict", "Dict", "Mapping", "MutableMapping", "OrderedDict", "tuple", "Tuple",
               "list", "List", "Sequence", "TypedDict")


# attributes of a tensor that a forward reads from a tensor parameter (fx records them as getattr)
_TENSOR_ATTRS = frozenset(("shape", "dtype", "device", "ndim", "T", "mT", "H", "data", "real", "imag",
                           "is_cuda", "layout", "requires_grad", "grad", "is_sparse"))


def _annotation_kind(annotation: Any) -> str | None:
    """``"dict"``/``"dataclass"``/``"tuple"``… when the annotation is a container of tensors."""
    if annotation is inspect.Parameter.empty:
        return None
    if isinstance(annotation, type) and dataclasses.is_dataclass(annotation):
        return "dataclass"
    text = annotation if isinstance(annotation, str) else getattr(annotation, "__name__", "") or str(annotation)
    head = text.replace("typing.", "").split("[")[0].strip()
    if head in _CONTAINERS:
        return head.lower().replace("mutablemapping", "mapping")
    origin = getattr(annotation, "__origin__", None)
    if origin in (dict, tuple, list):
        return origin.__name__
    return None


def _annotation_text(annotation: Any) -> str:
    if isinstance(annotation, str):
        return annotation
    if isinstance(annotation, type):
        return annotation.__name__
    return str(annotation).replace("typing.", "")


def _signature(module: Any) -> inspect.Signature:
    try:  # annotations written under `from __future__ import annotations` are strings
        return inspect.signature(module.forward, eval_str=True)
    except Exception:
        return inspect.signature(module.forward)


def refuse_annotated(module: Any, user: dict[str, Any], label: str) -> None:
    """Exit 3 when a forward parameter without ``--input`` is annotated as a dict or dataclass.

    A tuple/list parameter may be an LSTM's ``(h0, c0)`` pair passed whole (supported); it is
    refused after tracing, when the forward indexes it (``inputs[0]``)."""
    problems = []
    for p in _signature(module).parameters.values():
        kind = _annotation_kind(p.annotation)
        if kind is None or p.name in user or kind in ("tuple", "list", "sequence"):
            continue
        keys = [f.name for f in dataclasses.fields(p.annotation)] if kind == "dataclass" else []
        problems.append(_problem(module, p.name, f"annotated `{_annotation_text(p.annotation)}`",
                                 kind, keys, _annotation_text(p.annotation)))
    if problems:
        raise UnsupportedModelError(label, problems)


def refuse_read_as_structure(module: Any, gm: Any, params: list[str], concrete: dict[str, Any],
                             label: str) -> None:
    """Exit 3 when the traced graph reads keys (``x["k"]``) or fields (``x.k``) of a tensor parameter."""
    placeholders = [n for n in gm.graph.nodes if n.op == "placeholder"]
    annotated = {p.name: _annotation_kind(p.annotation) for p in _signature(module).parameters.values()}
    problems = []
    for name, ph in zip(params, placeholders, strict=False):
        if name in concrete:
            continue
        keys, kind = _reads(ph)
        seq = annotated.get(name)
        if not keys and seq in ("tuple", "list", "sequence") and _indexed(ph):
            text = _annotation_text(_annotation_of(module, name))
            problems.append(_problem(module, name, f"annotated `{text}` and indexed", seq, []))
            continue
        if keys:
            how = "read as " + ", ".join(f"{name}[{k!r}]" if kind == "dict" else f"{name}.{k}" for k in keys)
            problems.append(_problem(module, name, how, kind, keys))
    if problems:
        raise UnsupportedModelError(label, problems)


def _annotation_of(module: Any, name: str) -> Any:
    return _signature(module).parameters[name].annotation


def _indexed(ph: Any) -> bool:
    """Is ``ph`` read as ``ph[0]`` (an int index into a tuple/list)?"""
    return any(u.op == "call_function" and u.target is operator.getitem and u.args[0] is ph
               and isinstance(u.args[1], int) for u in ph.users)


def _reads(ph: Any) -> tuple[list[str], str]:
    """String keys (``x["k"]``) or non-tensor attribute names (``x.k``) read from ``ph``."""
    keys: list[str] = []
    kind = ""
    for u in ph.users:
        if u.op != "call_function" or len(u.args) < 2 or u.args[0] is not ph:
            continue
        k = u.args[1]
        if u.target is operator.getitem and isinstance(k, str):
            keys.append(k)
            kind = "dict"
        elif u.target is getattr and isinstance(k, str) and k not in _TENSOR_ATTRS:
            keys.append(k)
            kind = kind or "dataclass"
    return list(dict.fromkeys(keys)), kind


def _problem(module: Any, name: str, how: str, kind: str, keys: list[str],
             ctor: str = "YourDataclass") -> Unsupported:
    cls = type(module).__name__
    names = [k if k.isidentifier() else f"t{i}" for i, k in enumerate(keys)] or ["a", "b"]
    if kind in ("dict", "mapping", "ordereddict", "typeddict"):
        built = "{" + ", ".join(f"{k!r}: {n}" for k, n in zip(keys or names, names, strict=True)) + "}"
    elif kind == "dataclass":
        built = f"{ctor}({', '.join(f'{n}={n}' for n in names)})"
    else:
        built = f"({', '.join(names)})"
    args = ", ".join(names)
    wrapper = (
        "\n      class Wrapped(torch.nn.Module):"
        "\n          def __init__(self, model):"
        "\n              super().__init__()"
        "\n              self.model = model"
        f"\n          def forward(self, {args}):"
        f"\n              return self.model({built})"
    )
    return Unsupported(
        f"{cls}.forward parameter {name!r}",
        f"holds several tensors ({kind}; {how}); an ONNX input is one tensor",
        f"export a wrapper whose forward takes the tensors one by one (each becomes an ONNX input "
        f"under its own name; give dims with --input {names[0]}:batch,time,N):{wrapper}")
