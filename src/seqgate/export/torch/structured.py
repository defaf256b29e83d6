"""Forward parameters that hold several tensors (a dict, a dataclass, a tuple or list).

An ONNX graph input is one tensor. A dict or dataclass parameter is exported when every tensor
of it is declared on the command line, ``--input PARAM.KEY:DIMS`` (:func:`flat_forward`):

- each declared tensor becomes one ONNX input named ``PARAM.KEY`` (``batch.encoder_cont``):
  the name the user wrote, so the option, the recording's array key and the report agree, and
  a dot cannot collide with a forward() parameter name (``PARAM__KEY`` could). While tracing
  it is the identifier ``PARAM__KEY``; the export renames it at the graph boundary;
- a parameter annotated with a dataclass is built as ``Cls(KEY=tensor, ...)`` (its fields
  without defaults must all be declared); any other parameter (unannotated, ``dict``,
  ``Mapping``, ``TypedDict``) is a dict ``{KEY: tensor}``;
- the ONNX file records the mapping (``seqgate.input_structure``,
  ``seqgate.onnxfile.input_meta``) so verify and profile rebuild the structure for the source.

Without those options a parameter that holds several tensors is refused (exit 3) with a
message that says what seqgate saw — the parameter and its type annotation, or the
keys/fields the forward reads from it — and names the option, or shows a six-line wrapper
module whose ``forward`` takes the tensors one by one and rebuilds the structure.

Two checks: :func:`refuse_annotated` before tracing (the annotation names a dict, mapping,
dataclass, tuple or list), :func:`refuse_read_as_structure` after tracing (the traced graph
reads ``x["key"]`` or ``x.field`` of an unannotated parameter).
"""

from __future__ import annotations

import dataclasses
import inspect
import operator
from typing import Any

from seqgate.errors import BadInputError, Unsupported, UnsupportedModelError

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
    structured = kind in ("dict", "mapping", "ordereddict", "typeddict", "dataclass")
    each = (" ".join(f"--input {name}.{n}:DIM,DIM,..." for n in names) if keys
            else f"--input {name}.KEY:DIM,DIM,... for each KEY the forward reads")
    option = (f"declare each tensor on the command line, {each} (each becomes an ONNX "
              f"input named {name}.KEY and seqgate builds the {kind} from them"
              f"{', so declare every field without a default' if kind == 'dataclass' else ''}), or "
              if structured else "")
    return Unsupported(
        f"{cls}.forward parameter {name!r}",
        f"holds several tensors ({kind}; {how}); an ONNX input is one tensor",
        f"{option}export a wrapper whose forward takes the tensors one by one (each becomes an ONNX "
        f"input under its own name; give dims with --input {names[0]}:batch,time,N):{wrapper}")


# ----- --input PARAM.KEY: named tensors of a dict or dataclass parameter ----------------------
STRUCTURE_ATTR = "seqgate_input_structure"  # on the flat twin's class: the structure metadata
_DICT_KINDS = (None, "dict", "mapping", "ordereddict", "typeddict")


def ident(name: str) -> str:
    """The Python identifier that carries ONNX input ``PARAM.KEY`` through tracing (``PARAM__KEY``)."""
    return name.replace(".", "__")


def flat_forward(module: Any, declared: dict[str, Any], label: str) -> tuple[Any, dict[str, str]]:
    """``module`` itself when no ``--input`` names ``PARAM.KEY``; else a twin of it (same
    submodules, parameters and class name) whose ``forward`` takes every named tensor as a plain
    parameter ``PARAM__KEY``, builds the dict (or dataclass, from keyword tensors) and calls the
    original ``forward``. Also returns ``{PARAM__KEY: "PARAM.KEY"}``, the ONNX input names."""
    groups: dict[str, list[Any]] = {}
    for d in declared.values():
        if d.key is not None:
            groups.setdefault(d.param, []).append(d)
    if not groups:
        return module, {}
    sig = _signature(module)
    cls = type(module).__name__
    structure: dict[str, dict[str, Any]] = {}
    for param, items in groups.items():
        structure[param] = _entry(sig, param, [d.key for d in items], cls, items[0].name)
    names = {ident(d.name): d.name for items in groups.values() for d in items}
    clash = sorted(i for i in names if i in sig.parameters)
    if clash:
        raise BadInputError(f"--input {names[clash[0]]}: {cls}.forward already has a parameter named "
                            f"{clash[0]!r}, the name seqgate gives that tensor while tracing; rename one.")
    return _twin(module, sig, structure), names


def _entry(sig: inspect.Signature, param: str, keys: list[str], cls: str, shown: str) -> dict[str, Any]:
    """The structure record of one parameter; exit 2 when it cannot be built from named tensors."""
    p = sig.parameters.get(param)
    if p is None:
        raise BadInputError(f"--input {shown}: {cls}.forward has no parameter {param!r} (it takes "
                            f"{', '.join(sig.parameters) or 'no parameters'}); use PARAM.KEY with one of "
                            f"those.")
    kind = _annotation_kind(p.annotation)
    record = {"keys": {k: f"{param}.{k}" for k in keys}}
    if kind == "dataclass":
        fields = {f.name: f for f in dataclasses.fields(p.annotation)}
        unknown = [k for k in keys if k not in fields]
        missing = [n for n, f in fields.items() if n not in keys and f.init
                   and f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING]
        if unknown or missing:
            what = (f"has no field(s) {', '.join(unknown)}" if unknown
                    else f"needs field(s) {', '.join(missing)} that no --input names")
            raise BadInputError(
                f"--input {shown}: the dataclass {p.annotation.__name__} of {cls}.forward parameter "
                f"{param!r} {what}; seqgate builds it from keyword tensors, so declare exactly its "
                f"fields without defaults (and any others you want as inputs) as --input {param}.FIELD:DIMS.")
        ann = p.annotation
        return {"kind": "dataclass", "class": f"{ann.__module__}.{ann.__qualname__}", **record}
    if kind not in _DICT_KINDS or (kind is None and not _open_annotation(p.annotation)):
        raise BadInputError(
            f"--input {shown}: {cls}.forward parameter {param!r} is annotated "
            f"`{_annotation_text(p.annotation)}`; PARAM.KEY names one tensor of a dict or dataclass "
            f"parameter. Declare the parameter itself with --input {param}:DIMS instead.")
    return {"kind": "dict", **record}


def _open_annotation(annotation: Any) -> bool:
    """No annotation, or ``Any``: the parameter may be a dict."""
    text = annotation if isinstance(annotation, str) else getattr(annotation, "_name", None) or ""
    return annotation is inspect.Parameter.empty or text.replace("typing.", "") == "Any"


class _DeclaredDict(dict):  # type: ignore[type-arg]
    """The dict a traced forward receives: reading an undeclared key says which --input to add."""

    param = ""

    def __missing__(self, key: Any) -> Any:
        raise BadInputError(
            f"forward() reads {self.param}[{key!r}], but no --input declares {self.param}.{key}; add "
            f"--input {self.param}.{key}:DIM,DIM,... (every key the forward reads must be an input).")


def _builder(entry: dict[str, Any], annotation: Any, param: str) -> Any:
    keys = list(entry["keys"])
    if entry["kind"] == "dataclass":
        return lambda *tensors: annotation(**dict(zip(keys, tensors, strict=True)))

    def build(*tensors: Any) -> Any:
        out = _DeclaredDict(zip(keys, tensors, strict=True))
        out.param = param
        return out
    return build


def _twin(module: Any, sig: inspect.Signature, structure: dict[str, dict[str, Any]]) -> Any:
    """The flat twin (see :func:`flat_forward`); its forward is generated source, compiled under
    this file's name so that trace errors point at the user's lines, not at it."""
    import copy

    args: list[str] = []
    call: list[str] = []
    env: dict[str, Any] = {"_orig": type(module).forward}
    defaulted = False
    for p in sig.parameters.values():
        if p.name in structure:
            idents = [ident(n) for n in structure[p.name]["keys"].values()]
            args += [f"{i}=None" if defaulted else i for i in idents]
            env[f"_build_{p.name}"] = _builder(structure[p.name], p.annotation, p.name)
            call.append(f"{p.name}=_build_{p.name}({', '.join(idents)})")
            continue
        if p.default is not p.empty:
            env[f"_default_{p.name}"] = p.default
            defaulted = True
        args.append(f"{p.name}=_default_{p.name}" if p.default is not p.empty else
                    f"{p.name}=None" if defaulted else p.name)
        call.append(f"{p.name}={p.name}")
    source = f"def forward(self, {', '.join(args)}):\n    return _orig(self, {', '.join(call)})\n"
    exec(compile(source, __file__, "exec"), env)  # our own generated two lines, names from the signature
    cls = type(module)
    twin = copy.copy(module)
    twin.__class__ = type(cls.__name__, (cls,), {"forward": env["forward"], "__module__": cls.__module__,
                                                 "__qualname__": cls.__qualname__, STRUCTURE_ATTR: structure})
    return twin


def structure_metadata(module: Any) -> dict[str, str]:
    """``seqgate.input_structure`` (``seqgate.onnxfile.input_meta``) of a flat twin; {} otherwise."""
    import json

    from seqgate.onnxfile.input_meta import STRUCTURE_KEY

    structure = getattr(type(module), STRUCTURE_ATTR, None)
    return {STRUCTURE_KEY: json.dumps(structure, sort_keys=True)} if structure else {}


def renamed_metadata(meta: dict[str, str], names: dict[str, str]) -> dict[str, str]:
    """JSON metadata values with every string equal to a tracing identifier (``PARAM__KEY``)
    replaced by its ONNX input name (``PARAM.KEY``)."""
    import json

    if not names:
        return meta

    def swap(v: Any) -> Any:
        if isinstance(v, str):
            return names.get(v, v)
        if isinstance(v, list):
            return [swap(x) for x in v]
        if isinstance(v, dict):
            return {k: swap(x) for k, x in v.items()}
        return v
    return {k: json.dumps(swap(json.loads(v)), sort_keys=True) for k, v in meta.items()}
