"""Input spec of a traced PyTorch module, and the two sample runs that give static shapes.

Graph inputs are the parameters of ``forward``, in order, under their own names:

- a parameter without a default is a tensor input;
- a parameter with a default (``h0=None``, ``scale=2.0``) is traced with that default fixed,
  unless ``--input NAME:DIMS`` names it, which makes it a tensor input;
- a tensor input that the traced graph never reads is left out of the ONNX file.

Dims of a tensor input come from ``--input NAME:DIM,DIM,...`` (integers, symbolic names or
``NAME+K``; the option's dtype and value range too: ``declared.py``) or are inferred from
the first module that consumes it (through dropout/identity/activation modules and
``contiguous``/``float``):

- ``nn.RNN/GRU/LSTM`` input: ``[batch, time, I]`` when ``batch_first`` else ``[time, batch, I]``;
  its ``h0``/``c0`` argument: ``[L·D, batch, H]`` (``batch_first`` never changes states); a
  parameter passed whole as an LSTM's ``(h0, c0)`` pair (``forward(x, hidden)``) becomes two
  ONNX inputs ``hidden_0`` and ``hidden_1``;
- ``nn.Linear``: ``[batch, in_features]``;  ``nn.Conv1d``: ``[batch, C_in, time]``;
- ``nn.Embedding``: ``[batch, time]`` of int64 (this also makes an ``--input`` spec int64).

- ``pack_padded_sequence``'s lengths: ``[batch]`` int64, sampled as the full time size (valid
  for sorted and unsorted packing); its data is read by the recurrent module in the layout the
  packing call names (``batch_first`` of the call, not of the module).

Other consumers (``torch.zeros_like(h0)``) are passed over; the first module of those kinds
that reads the input, directly or through shape-keeping ops (activations, ``x - buffer``,
``x / 2``, slicing with slices only such as ``x[:, -12:]``), decides. Through
``unsqueeze``/``transpose``/``permute`` its dims are mapped back (``x.transpose(1, 2)`` into a
Conv1d gives ``[batch, time, C_in]``).

Static shapes: the module runs twice (``torch.no_grad``) on seeded random inputs whose symbolic
dims take different values in the two runs (batch 3/2, time 13/17, others from two disjoint
pools: ``samples.py``). A failed run is exit 2 (:class:`GuessedShapeError`), naming the shapes
seqgate guessed, if any. A dim of an intermediate tensor that is equal in both runs is static;
a dim that follows one symbol's values in both runs is named after it on graph outputs.
"""

from __future__ import annotations

import inspect
import warnings
from dataclasses import dataclass, field
from typing import Any

from seqgate.errors import BadInputError, Unsupported, UnsupportedModelError
from seqgate.export.torch.declared import Declared
from seqgate.export.torch.samples import sample_args, symbol_values
from seqgate.util.text import first_line

_PASS_MODULES = (
    "Dropout", "Dropout1d", "Dropout2d", "Dropout3d", "AlphaDropout", "FeatureAlphaDropout",
    "Identity", "ReLU", "Tanh", "Sigmoid", "GELU", "SiLU", "ELU", "LeakyReLU", "Softplus",
    "Hardtanh", "ReLU6", "Softsign", "Mish",
)
_PASS_METHODS = ("contiguous", "float", "to", "clone", "detach", "relu", "tanh", "sigmoid",
                 "cpu", "long", "int")
_PASS_FUNCTIONS = ("relu", "tanh", "sigmoid", "dropout", "gelu", "silu",
                   "add", "sub", "mul", "truediv")  # x ∘ buffer or scalar: x's dims (broadcast)


@dataclass(frozen=True)
class InputSpec:
    """One ONNX graph input."""

    name: str
    dims: tuple[int | str, ...]
    dtype: str = "float32"
    how: str = ""  # where the dims came from, for messages
    id_limit: int | None = None  # int inputs: sample ids in [0, id_limit)
    parts: int = 0  # 2: a (h0, c0) pair, given to ONNX as NAME_0 and NAME_1 of these dims
    fill: str = ""  # "lengths": a pack_padded_sequence lengths input, sampled as the full time size
    low: int | str | None = None  # --input NAME:...=LOW..HIGH: sampled in this range (dims allowed)
    high: int | str | None = None

    @property
    def onnx_names(self) -> list[str]:
        return [f"{self.name}_{i}" for i in range(self.parts)] if self.parts else [self.name]


@dataclass
class Plan:
    """How to trace ``forward`` and which tensor inputs the ONNX graph has."""

    params: list[str]
    concrete: dict[str, Any]
    inputs: list[InputSpec] = field(default_factory=list)
    unused: list[str] = field(default_factory=list)
    declared: dict[str, Declared] = field(default_factory=dict)  # --input, by name
    onnx_names: dict[str, str] = field(default_factory=dict)  # param → ONNX input name, when they differ


@dataclass(frozen=True)
class TMeta:
    """A tensor seen in both sample runs."""

    shape_a: tuple[int, ...]
    shape_b: tuple[int, ...]
    dtype: str

    @property
    def shape(self) -> tuple[int | None, ...]:
        if len(self.shape_a) != len(self.shape_b):
            raise ValueError("rank changed between the sample runs")
        return tuple(a if a == b else None for a, b in zip(self.shape_a, self.shape_b, strict=True))


@dataclass(frozen=True)
class DynInt:
    """An int that differed between the two runs (a size that follows a dynamic dim)."""

    a: int
    b: int


# ----- the plan ---------------------------------------------------------------------------
def forward_params(module: Any, user: dict[str, tuple[int | str, ...]], label: str) -> Plan:
    """Split forward()'s parameters into tensor inputs and fixed defaults (module docstring)."""
    sig = inspect.signature(module.forward)
    params: list[str] = []
    concrete: dict[str, Any] = {}
    for p in sig.parameters.values():
        if p.kind in (p.VAR_POSITIONAL, p.VAR_KEYWORD):
            raise UnsupportedModelError(label, [Unsupported(
                f"{type(module).__name__}.forward", f"takes *{p.name}" if p.kind == p.VAR_POSITIONAL
                else f"takes **{p.name}", "give forward() named parameters, one per input")])
        params.append(p.name)
        if p.default is not p.empty and p.name not in user:
            concrete[p.name] = p.default
    unknown = [n for n in user if n not in params]
    if unknown:
        raise BadInputError(f"--input names {', '.join(unknown)}, but {type(module).__name__}.forward "
                            f"takes {', '.join(params) or 'no parameters'}; use those names.")
    return Plan(params=params, concrete=concrete)


def infer_inputs(gm: Any, plan: Plan, user: dict[str, tuple[int | str, ...]], label: str) -> None:
    """Fill ``plan.inputs``/``plan.unused`` from ``--input`` specs and the consuming modules."""
    placeholders = [n for n in gm.graph.nodes if n.op == "placeholder"]
    missing: list[str] = []
    for name, ph in zip(plan.params, placeholders, strict=True):
        if name in plan.concrete:
            continue
        g = _guess(gm, ph)
        if name in user:
            d = plan.declared.get(name)
            dtype = (d.dtype if d else None) or (g.dtype if g else "float32")
            plan.inputs.append(InputSpec(name, user[name], dtype, "--input",
                                         g.id_limit if g else None, g.parts if g else 0,
                                         g.fill if g else "", d.low if d else None, d.high if d else None))
        elif not ph.users:
            plan.unused.append(name)
        elif g is None:
            missing.append(name)
        else:
            plan.inputs.append(g.spec(name))
    if missing:
        raise BadInputError(
            f"cannot infer the shape of forward() input(s) {', '.join(missing)} of {label}: no "
            f"recurrent, Linear, Conv1d or Embedding module reads them directly. Pass "
            f"--input NAME:DIM,DIM,... for each (integers or symbolic names), e.g. "
            f"--input {missing[0]}:batch,time,8."
        )


@dataclass(frozen=True)
class _Guess:
    dims: tuple[int | str, ...]
    dtype: str = "float32"
    id_limit: int | None = None
    parts: int = 0
    how: str = ""
    fill: str = ""

    def spec(self, name: str) -> InputSpec:
        return InputSpec(name, self.dims, self.dtype, self.how, self.id_limit, self.parts, self.fill)


Dims = tuple[int | str, ...]


def _guess(gm: Any, ph: Any) -> _Guess | None:
    """Dims (and dtype) from the first module that reads ``ph`` (module docstring).

    Other consumers are skipped. Shape-keeping ones (``_PASS_*``) and the layout changes
    ``unsqueeze``/``transpose``/``permute`` pass the value on; for the latter the module's dims
    are mapped back through the inverse change (``x.unsqueeze(-1)`` into ``LSTM(1, H)`` gives
    ``x: [batch, time]``; ``x.transpose(1, 2)`` into ``Conv1d`` gives ``[batch, time, C]``).
    """
    from seqgate.export.torch.subclassed import is_base_forward, module_call

    carry: dict[Any, Any] = {ph: lambda d: d}  # carried node → consumer dims ↦ placeholder dims
    for node in gm.graph.nodes:
        used = [a for a in _flat(node.args) + _flat(list(node.kwargs.values())) if a in carry]
        if not used:
            continue
        src = node.args[0] if node.args and _carried(node.args[0], carry) else None
        packed = _packing_guess(node, carry, src)
        if isinstance(packed, _Guess):
            return packed
        if packed:
            continue
        if node.op == "call_module" or is_base_forward(node):
            m, margs, mkwargs = (gm.get_submodule(node.target), node.args, node.kwargs) \
                if node.op == "call_module" else module_call(gm, node)
            cls = type(m).__name__
            hit = _module_guess(m, margs, mkwargs, carry)
            if hit is not None:
                back = carry[used[0]](hit.dims)
                if back is None:
                    return None
                return _Guess(back, hit.dtype, hit.id_limit, hit.parts, f"{node.target} ({cls})")
            if cls in _PASS_MODULES and src is not None:
                carry[node] = carry[src]
        elif src is None:
            continue
        elif (node.op == "call_method" and node.target in _PASS_METHODS) or (
                node.op == "call_function" and getattr(node.target, "__name__", "") in _PASS_FUNCTIONS
        ) or _keeps_rank(node):
            carry[node] = carry[src]
        else:
            inv = _inverse_layout(node)
            if inv is not None:
                carry[node] = lambda d, inv=inv, up=carry[src]: None if (v := inv(d)) is None else up(v)
    return None


def _packing_guess(node: Any, carry: dict[Any, Any], src: Any) -> _Guess | bool:
    """``pack_padded_sequence(x, lengths, batch_first)``: the lengths are ``[batch]`` int64; the
    data is carried to the recurrent module in the layout the packing call names."""
    from seqgate.export.torch.packing import PACK

    if node.op != "call_function" or node.target is not PACK:
        return False
    lengths = node.args[1] if len(node.args) > 1 else node.kwargs.get("lengths")
    if _carried(lengths, carry) and lengths is not src:
        return _Guess(("batch",), "int64", fill="lengths", how="pack_padded_sequence lengths")
    if src is not None:
        carry[node] = carry[src]
        bf = node.args[2] if len(node.args) > 2 else node.kwargs.get("batch_first", False)
        carry[("packed", node)] = bool(bf)
    return True


def _keeps_rank(node: Any) -> bool:
    """``x[:, -12:]``, ``x[..., :3]``: an index of slices only keeps every axis (its size may change)."""
    if node.op != "call_function" or getattr(node.target, "__name__", "") != "getitem" or len(node.args) != 2:
        return False
    index = node.args[1] if isinstance(node.args[1], tuple) else (node.args[1],)
    return all(isinstance(i, slice) or i is Ellipsis for i in index)


def _inverse_layout(node: Any) -> Any:
    """Consumer dims ↦ dims before ``node`` for unsqueeze/transpose/permute with int args, else None."""
    name = node.target if node.op == "call_method" else getattr(node.target, "__name__", "")
    args = list(node.args[1:])
    if node.kwargs or not all(isinstance(a, int) or (isinstance(a, tuple | list) and
                                                     all(isinstance(v, int) for v in a)) for a in args):
        return None
    if name == "unsqueeze" and len(args) == 1:
        def un(d: Dims) -> Dims | None:
            a = args[0] % len(d)
            return d[:a] + d[a + 1:] if d[a] == 1 else None
        return un
    if name in ("transpose", "swapaxes", "swapdims") and len(args) == 2:
        def tr(d: Dims) -> Dims:
            out = list(d)
            i, j = args[0] % len(d), args[1] % len(d)
            out[i], out[j] = out[j], out[i]
            return tuple(out)
        return tr
    if name == "permute" and args:
        perm = list(args[0]) if len(args) == 1 and isinstance(args[0], tuple | list) else list(args)

        def pe(d: Dims) -> Dims | None:
            if len(perm) != len(d):
                return None
            out: list[int | str] = [0] * len(d)
            for i, p in enumerate(perm):
                out[p % len(d)] = d[i]
            return tuple(out)
        return pe
    return None


def _module_guess(m: Any, args: tuple[Any, ...], kwargs: dict[str, Any],
                  carry: dict[Any, Any]) -> _Guess | None:
    import torch.nn as nn

    first = args[0] if args else kwargs.get("input")
    if isinstance(m, nn.RNNBase):
        d = 2 if m.bidirectional else 1
        if _carried(first, carry):
            f = int(m.input_size)
            bf = carry.get(("packed", first), m.batch_first)  # a packed input has the packing's layout
            return _Guess(("batch", "time", f) if bf else ("time", "batch", f))
        hx = args[1] if len(args) > 1 else kwargs.get("hx")
        # forward(x, hidden): hidden = (h0, c0)
        pair = 2 if isinstance(m, nn.LSTM) and _carried(hx, carry) else 0
        return _Guess((int(m.num_layers) * d, "batch", int(m.hidden_size)), parts=pair)
    if not _carried(first, carry):
        return None
    if isinstance(m, nn.Linear):
        return _Guess(("batch", int(m.in_features)))
    if isinstance(m, nn.Conv1d):
        return _Guess(("batch", int(m.in_channels), "time"))
    if isinstance(m, nn.Embedding):
        return _Guess(("batch", "time"), "int64", int(m.num_embeddings))
    return None


def _carried(arg: Any, carry: dict[Any, Any]) -> bool:
    """Whether ``arg`` is an fx node that carries the placeholder.

    Only nodes are looked up: fx arguments also hold slices, which are not hashable on
    Python 3.11 (they are from 3.12 on), so ``slice in dict`` raises TypeError there.
    """
    from torch.fx import Node

    return isinstance(arg, Node) and arg in carry


def _flat(args: Any) -> list[Any]:
    """Every fx node inside an argument structure (lists, tuples, dicts, slices)."""
    from torch.fx import Node

    out: list[Any] = []
    if isinstance(args, list | tuple):
        for a in args:
            out.extend(_flat(a))
    elif isinstance(args, dict):
        for a in args.values():
            out.extend(_flat(a))
    elif isinstance(args, slice):
        out.extend(_flat([args.start, args.stop, args.step]))
    elif isinstance(args, Node):
        out.append(args)
    return out


# ----- sample runs ------------------------------------------------------------------------
def record_runs(gm: Any, plan: Plan, label: str) -> tuple[dict[str, Any], dict[str, int], dict[str, int]]:
    """Run ``gm`` twice; return {node name: merged meta} and both runs' symbol sizes."""
    sa, sb = symbol_values(plan.inputs)
    ra = _record(gm, plan, sa, 0, label)
    rb = _record(gm, plan, sb, 1, label)
    return {k: _merge(ra[k], rb[k]) for k in ra if k in rb}, sa, sb


def _record(gm: Any, plan: Plan, sizes: dict[str, int], seed: int, label: str) -> dict[str, Any]:
    import torch
    import torch.fx

    seen: dict[str, Any] = {}

    class Recorder(torch.fx.Interpreter):
        def run_node(self, n: Any) -> Any:
            try:
                out = super().run_node(n)
            except Exception as e:
                raise _RunFailed(n, e) from e
            seen[n.name] = _summary(out)
            return out

    args = sample_args(plan, sizes, seed)
    try:
        # the sample runs only read shapes: torch's own performance warnings would be noise here
        with torch.no_grad(), warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            Recorder(gm).run(*args)
    except _RunFailed as f:
        shapes = ", ".join(f"{plan.onnx_names.get(s.name, s.name)}: {[sizes.get(d, d) for d in s.dims]}"
                           for s in plan.inputs)
        guessed = [s for s in plan.inputs if s.how != "--input"]
        said = ("; no --input gave the shape, so seqgate guessed " + ", ".join(
            f"{plan.onnx_names.get(s.name, s.name)} as [{', '.join(str(d) for d in s.dims)}] (from {s.how})"
            for s in guessed)
            + f", and the guess is probably wrong. Pass the real shape with --input {guessed[0].name}:"
              f"DIM,DIM,... (e.g. --input {guessed[0].name}:batch,time,N)") if guessed else (
            ". Check the dims given with --input")
        raise GuessedShapeError(
            f"running {label} on sample inputs ({shapes}) failed at {_where(f.node)} with "
            f"{type(f.error).__name__}: {first_line(f.error)}{said}."
        ) from None
    return seen


class GuessedShapeError(BadInputError):
    """The module failed on sample inputs whose shape seqgate guessed or the user gave (exit 2)."""


def guessed_shape_error(label: str, guessed: dict[str, tuple[int | str, ...]], how: str,
                        error: BaseException) -> GuessedShapeError:
    """Exit 2: a run on sample values failed (the loop capture's trace) and at least one input's
    shape was a guess (``how`` says where it came from)."""
    shown = ", ".join(f"{n} as [{', '.join(str(d) for d in dims)}]" for n, dims in guessed.items())
    first = next(iter(guessed))
    return GuessedShapeError(
        f"running {label} on sample inputs failed ({type(error).__name__}: {first_line(error)}); "
        f"no --input gave the shape, so seqgate guessed {shown} ({how}), and the guess is probably "
        f"wrong. Pass the real shape with --input {first}:DIM,DIM,... (integers or symbolic names "
        f"such as batch and time), e.g. --input {first}:batch,time,N.")


class _RunFailed(Exception):
    def __init__(self, node: Any, error: BaseException) -> None:
        super().__init__(str(error))
        self.node = node
        self.error = error


def _where(node: Any) -> str:
    from seqgate.export.torch.values import source_line

    line = source_line(node)
    return f"{node.name}{' (' + line + ')' if line else ''}"


def _summary(v: Any) -> Any:
    import torch

    if isinstance(v, torch.Tensor):
        return ("tensor", tuple(int(d) for d in v.shape), str(v.dtype).replace("torch.", ""))
    if isinstance(v, torch.Size):
        return ("size", tuple(int(d) for d in v))
    if isinstance(v, list | tuple):
        return tuple(_summary(x) for x in v)
    if isinstance(v, dict):
        return {k: _summary(x) for k, x in v.items()}
    if isinstance(v, bool | float | str) or v is None:
        return v
    if isinstance(v, int):
        return int(v)
    return ("other", type(v).__name__)


def _merge(a: Any, b: Any) -> Any:
    if isinstance(a, tuple) and a[:1] == ("tensor",) and isinstance(b, tuple) and b[:1] == ("tensor",):
        return TMeta(a[1], b[1], a[2])
    if isinstance(a, tuple) and a[:1] in (("size",), ("other",)):
        return a
    if isinstance(a, dict) and isinstance(b, dict):
        return {k: _merge(a[k], b[k]) for k in a if k in b}
    if isinstance(a, tuple) and isinstance(b, tuple) and len(a) == len(b):
        return tuple(_merge(x, y) for x, y in zip(a, b, strict=True))
    if isinstance(a, int) and not isinstance(a, bool) and isinstance(b, int) and a != b:
        return DynInt(a, b)
    return a


def output_dims(meta: TMeta, sa: dict[str, int], sb: dict[str, int], oname: str) -> list[int | str]:
    """Graph-output dims: static ints, else the symbol whose sizes the dim followed."""
    dims: list[int | str] = []
    for i, (x, y) in enumerate(zip(meta.shape_a, meta.shape_b, strict=True)):
        if x == y:
            dims.append(int(x))
            continue
        sym = next((s for s in sa if sa[s] == x and sb.get(s) == y), None)
        dims.append(sym or f"{oname}_dim{i}")
    return dims
