"""Values flowing through the PyTorch capture, and the shape-vector helpers they need.

A traced ``fx`` node evaluates, in the ONNX graph being built, to one of:

- :class:`TV` — a tensor: ONNX value name, static shape (an int where the dim is the same for
  every input size, ``None`` where it follows a symbolic input dim) and dtype name;
- a Python ``int``/``float``/``bool``/``None``/tuple — a value fixed at export time;
- :class:`DimV` — a size that depends on a symbolic input dim (``x.size(0)``): an int64 ONNX
  tensor of shape ``[1]``, so sizes concatenate straight into Reshape/Expand shape vectors;
- :class:`ShapeV` — ``x.shape`` / ``x.size()``, read lazily one dim at a time;
- :class:`Opaque` — a value only passed along and ignored (``x.device``);
- :data:`UNKNOWN` — the result of a refused node, so the walk can go on and report every
  refusal at once.

Static shapes come from running the module twice on inputs of different sizes
(``torch_inputs``): a dim equal in both runs is static.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from seqgate.errors import Refusal
from seqgate.export.core.builder import GraphBuilder, Value

INT64_MAX = int(np.iinfo(np.int64).max)


@dataclass(frozen=True)
class TV(Value):
    """A tensor value (see module docstring)."""

    def axis(self, dim: int, extra: int = 0) -> int:
        """``dim`` made non-negative for a tensor of rank ``rank + extra``; refuses out of range."""
        n = self.rank + extra
        if not -n <= dim < n:
            raise Refusal(f"dim {dim} is out of range for a tensor of rank {self.rank}")
        return dim % n if n else 0


@dataclass(frozen=True)
class DimV:
    """A dynamic size: int64 ONNX tensor of shape [1]."""

    name: str


@dataclass(frozen=True)
class ShapeV:
    """The shape of ``of``; ``start:stop`` selects a part of it (``x.shape[1:]``)."""

    of: TV
    start: int = 0
    stop: int | None = None

    @property
    def dims(self) -> range:
        stop = self.of.rank if self.stop is None else self.stop
        return range(self.start, stop)


@dataclass(frozen=True)
class Opaque:
    """A value that is carried but never turned into ONNX (a device, a dtype-less marker)."""

    what: str


@dataclass(frozen=True)
class Assigned:
    """What ``x[idx] = v`` maps to: the ONNX value ``x`` holds afterwards (the walk rebinds x)."""

    value: str


class _Unknown:
    def __repr__(self) -> str:
        return "UNKNOWN"


UNKNOWN: Any = _Unknown()


def want_tensor(v: Any, what: str = "argument") -> TV:
    """``v`` as a :class:`TV` or a refusal naming what it was."""
    if isinstance(v, TV):
        return v
    raise Refusal(f"{what} is a {_kind(v)}, expected a tensor")


def want_int(v: Any, what: str = "argument") -> int:
    if isinstance(v, bool) or not isinstance(v, int):
        raise Refusal(f"{what} is a {_kind(v)}, expected an integer fixed at export time")
    return v


def _kind(v: Any) -> str:
    if isinstance(v, DimV):
        return "size that depends on the input's dynamic dims"
    if isinstance(v, ShapeV):
        return "shape"
    return type(v).__name__


def dim_of(b: GraphBuilder, x: TV, axis: int) -> int | DimV:
    """Size of ``x`` along ``axis``: an int when static, else ``Shape(start, end)``."""
    a = x.axis(axis)
    d = x.shape[a]
    if d is not None:
        return d
    return DimV(b.op("Shape", [x.name], start=a, end=a + 1))


def shape_part(b: GraphBuilder, s: ShapeV) -> list[int | DimV]:
    """The dims of ``s``, each an int or a one-element dynamic size."""
    return [dim_of(b, s.of, a) for a in s.dims]


def shape_vector(b: GraphBuilder, parts: Sequence[int | DimV]) -> str:
    """One 1-D int64 tensor from static ints and ``[1]`` dynamic sizes (Concat when mixed)."""
    if all(isinstance(p, int) for p in parts):
        return b.ints([int(p) for p in parts])  # type: ignore[arg-type]
    pieces: list[str] = []
    run: list[int] = []
    for p in parts:
        if isinstance(p, DimV):
            if run:
                pieces.append(b.ints(run))
                run = []
            pieces.append(p.name)
        else:
            run.append(int(p))
    if run:
        pieces.append(b.ints(run))
    return pieces[0] if len(pieces) == 1 else b.op("Concat", pieces, axis=0)


def size_parts(b: GraphBuilder, args: Sequence[Any]) -> list[int | DimV]:
    """``view(*sizes)`` / ``view(sizes)`` / ``view(x.shape)`` arguments as shape parts."""
    if len(args) == 1 and isinstance(args[0], list | tuple | ShapeV):
        args = args[0] if not isinstance(args[0], ShapeV) else [args[0]]
    parts: list[int | DimV] = []
    for a in args:
        if isinstance(a, ShapeV):
            parts.extend(shape_part(b, a))
        elif isinstance(a, DimV):
            parts.append(a)
        else:
            parts.append(want_int(a, "a size"))
    return parts


def dim_scalar(b: GraphBuilder, d: DimV, dtype: str) -> str:
    """A dynamic size as a 0-d tensor of ``dtype`` (for arithmetic with tensors)."""
    from seqgate.export.core.builder import np_to_onnx_type

    s = b.squeeze(d.name, [0])
    return s if dtype == "int64" else b.op("Cast", [s], to=np_to_onnx_type(np.dtype(dtype)))


# ----- one traced call, and strict argument binding ---------------------------------------
@dataclass
class TorchCall:
    """What a mapping receives for one fx node.

    ``name`` is the module's qualified name for ``call_module`` nodes, else the fx node name.
    ``used`` holds the index paths of the result that the rest of the graph reads (``()`` =
    the whole value); see :meth:`uses`.
    """

    node: Any
    name: str
    args: tuple[Any, ...]
    kwargs: dict[str, Any]
    meta: Any
    module: Any = None
    used: frozenset[tuple[int, ...]] = frozenset({()})
    call_index: int = 0
    label: str = ""  # "Tensor.view", "torch.cat", "LSTM" — for messages
    # The capture itself (``walk``, ``clean``, ``tracer_class``) for mappings that walk a
    # sub-graph (a user cell's step): handed in, so those modules need not import the walker.
    capture: Any = None

    def uses(self, *path: int) -> bool:
        """Is the part of the result at ``path`` (e.g. ``(1, 0)`` = h of an LSTM) needed?"""
        return any(p == path[: len(p)] or path == p[: len(path)] for p in self.used)


_SIGNATURES: dict[int, Any] = {}


def bind(signature_of: Any, args: tuple[Any, ...], kwargs: dict[str, Any], what: str) -> dict[str, Any]:
    """Bind arguments to a Python signature (a function used as its carrier), defaults applied.

    Unknown keywords or too many arguments are refused rather than ignored.
    """
    import inspect

    sig = _SIGNATURES.get(id(signature_of))
    if sig is None:
        sig = _SIGNATURES[id(signature_of)] = inspect.signature(signature_of)
    try:
        ba = sig.bind(*args, **kwargs)
    except TypeError as e:
        raise Refusal(f"{what} is called with arguments seqgate does not recognise ({e})") from None
    ba.apply_defaults()
    return dict(ba.arguments)


# ----- function and method tables ---------------------------------------------------------
class Table:
    """A module's own table of function/method mappings, merged by ``registry`` explicitly.

    ``@table.add(torch.cat, "Tensor.cat", sig=...)`` records ``fn`` for each key (a function
    object, or ``"Tensor.name"`` for a tensor method); ``sig`` is a function whose signature the
    call's arguments are bound to (see :func:`bind`). Nothing outside the module is touched.
    """

    def __init__(self) -> None:
        self.functions: dict[Any, Any] = {}
        self.methods: dict[str, Any] = {}

    def add(self, *keys: Any, sig: Any) -> Any:
        def deco(fn: Any) -> Any:
            def mapping(b: GraphBuilder, call: TorchCall) -> Any:
                return fn(b, call, bind(sig, call.args, call.kwargs, call.label or call.name))

            for k in keys:
                if isinstance(k, str) and k.startswith("Tensor."):
                    self.methods[k[len("Tensor."):]] = mapping
                else:
                    self.functions[k] = mapping
            return fn

        return deco


# ----- where a node came from ---------------------------------------------------------------
_FRAME = re.compile(r'File "(?P<file>[^"]+)", line (?P<line>\d+), in (?P<fn>\S+)\n(?P<code>[^\n]*)')


def source_line(node: Any) -> str:
    """``file.py:LINE: `code``` of the user's line that created ``node`` (fx stack trace)."""
    text = node.meta.get("stack_trace") or ""
    frames = [m for m in _FRAME.finditer(text)
              if "/torch/" not in m.group("file") and "/seqgate/export/" not in m.group("file")]
    if not frames:
        return ""
    m = frames[-1]  # innermost: the forward() line inside the nested module that made the node
    return f"{Path(m.group('file')).name}:{m.group('line')}: `{m.group('code').strip()}`"
