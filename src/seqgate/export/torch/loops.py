"""Capture of a ``forward`` that runs a recurrent cell in a Python loop over time.

``torch.fx.symbolic_trace`` cannot follow ``for t in range(x.size(1))`` (a traced size is not a
Python int). This module traces such a forward with a :class:`ValueTracer`: every fx proxy
also carries the value the op gives on a concrete sample input, so a size used as a Python
number (``range(x.size(1))``, ``len(x)``, ``for x_t in x.unbind(1)``) becomes that number and
the loop unrolls. Cell modules (``nn.LSTMCell``/``GRUCell``/``RNNCell``) stay leaves.

Contract (the proof that the unrolled loop is one recurrent op over a dynamic time axis):

1. the forward is traced twice, at two different batch sizes and sequence lengths
   (``samples.SAMPLE_A``/``SAMPLE_B``);
2. in each trace, ``loopfold.fold_loops`` replaces every run of cell calls that is exactly
   ``state_{t+1} = cell(X[:, t], state_t)`` for t = 0..T−1 (T = X's time size) by one
   :class:`~seqgate.export.torch.loopfold.CellLoop` leaf (module docstring there);
3. the two folded graphs must be the same graph (same ops, targets, constants and wiring).
   A size of the sample that leaked into the graph as a constant (a loop over time that was
   not folded, ``torch.zeros(3, 16)`` from a batch size) makes them differ, and the export is
   refused naming the first differing line — never exported for one length only.

Calls of a cell that are not a loop over an input's time axis (a decoder fed its own
prediction for a fixed horizon) stay unrolled: each is a one-step native node (``cells``).
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from seqgate.errors import BadInputError, SeqgateError, Unsupported, UnsupportedModelError


def cell_classes() -> tuple[type, ...]:
    from torch import nn

    return (nn.LSTMCell, nn.GRUCell, nn.RNNCell)


def has_cells(module: Any) -> bool:
    """Does ``module`` hold a built-in recurrent cell (then the loop capture is used)?"""
    return any(isinstance(m, cell_classes()) for m in module.modules())


def user_cell_candidates(module: Any) -> list[Any]:
    """Submodules written by the user whose ``forward`` takes an input and a state (≥ 2 parameters).

    A subclass of nn.LSTM/GRU/RNN runs whole sequences, not one step: it is traced through
    (``subclassed``), never a cell candidate."""
    import inspect

    from torch import nn

    out = []
    for name, m in module.named_modules():
        if not name or type(m).__module__.startswith("torch.") or isinstance(m, nn.RNNBase):
            continue
        params = [p for p in inspect.signature(m.forward).parameters.values()
                  if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)]
        if len(params) >= 2:
            out.append(m)
    return out


_FIXED_ATTRS = ("dtype", "device")


def _proxy_class() -> type:
    """A proxy whose sizes can be read as Python numbers (the sample's), and whose dtype and
    device are the sample's (they follow from the declared input dtypes, so they are the same at
    every size; ``torch.finfo(x.dtype).eps`` becomes a number)."""
    import torch
    import torch.fx
    from torch.fx.proxy import Attribute, TraceError

    from seqgate.export.torch.assign import record_setitem
    from seqgate.export.torch.branches import record_number

    class ValueProxy(torch.fx.Proxy):
        __setitem__ = record_setitem  # x[idx] = v: recorded, and applied to the sample value too

        def __index__(self) -> int:
            v = self.tracer.value_of(self)  # type: ignore[attr-defined]
            if isinstance(v, int) and not isinstance(v, bool):
                record_number(self.tracer.decisions, v)  # type: ignore[attr-defined]
                return v
            raise TraceError(f"{self.node.name} is a tensor, not an integer")

        def __int__(self) -> int:
            return self.__index__()

        def __len__(self) -> int:
            n = len(self.tracer.value_of(self))  # type: ignore[attr-defined]
            record_number(self.tracer.decisions, n)  # type: ignore[attr-defined]
            return n

        def __iter__(self) -> Any:
            return iter([self[i] for i in range(len(self.tracer.value_of(self)))])  # type: ignore[attr-defined]

        def __getattr__(self, k: str) -> Any:
            if k in _FIXED_ATTRS:  # x.dtype, x.device: fixed for the export, read from the sample
                v = getattr(self.tracer.value_of(self), k, None)  # type: ignore[attr-defined]
                if isinstance(v, torch.dtype | torch.device):
                    return v
            return ValueAttribute(self, k)  # x.shape: len(x.shape) and `for d in x.shape` work too

    class ValueAttribute(Attribute):
        __len__ = ValueProxy.__len__
        __iter__ = ValueProxy.__iter__

    return ValueProxy


class _SampleValues:
    """Tracer mixin: every recorded node also gets its value on the sample inputs (``values``)."""

    inputs: dict[str, Any]
    values: dict[Any, Any]
    computing: bool
    root: Any

    def value_of(self, a: Any) -> Any:
        import torch.fx
        from torch.fx.proxy import Attribute

        if isinstance(a, Attribute):
            return getattr(self.value_of(a.root), a.attr)
        if isinstance(a, torch.fx.Proxy):
            return self.values[a.node]
        if isinstance(a, list | tuple):
            return type(a)(self.value_of(x) for x in a)
        if isinstance(a, dict):
            return {k: self.value_of(v) for k, v in a.items()}
        if isinstance(a, slice):
            return slice(self.value_of(a.start), self.value_of(a.stop), self.value_of(a.step))
        return a

    def create_proxy(self, kind: str, target: Any, args: Any, kwargs: Any, name: Any = None,
                     type_expr: Any = None, proxy_factory_fn: Any = None) -> Any:
        import torch

        p = super().create_proxy(kind, target, args, kwargs, name, type_expr, proxy_factory_fn)  # type: ignore[misc]
        self.computing = True
        try:
            with torch.no_grad():
                self.values[p.node] = self._evaluate(kind, target, args, kwargs)
        finally:
            self.computing = False
        return p

    def as_items(self, p: Any) -> Any:
        """A proxy whose sample value is a plain tuple (nn.LSTM's ``(out, (h, c))``) as a tuple of
        its items' proxies, nested alike, so that ``isinstance(h, tuple)`` and ``len(h)`` in the
        forward see what eager code sees."""
        import operator

        import torch.fx

        if not isinstance(p, torch.fx.Proxy) or type(self.values.get(p.node)) is not tuple:
            return p
        n = len(self.values[p.node])
        return tuple(self.as_items(self.create_proxy("call_function", operator.getitem, (p, i), {}))
                     for i in range(n))

    def _evaluate(self, kind: str, target: Any, args: Any, kwargs: Any) -> Any:
        if kind == "placeholder":
            return self.inputs.get(target)
        if kind == "get_attr":
            obj: Any = self.root
            for part in str(target).split("."):
                obj = getattr(obj, part)
            return obj
        a, k = self.value_of(args), self.value_of(kwargs)
        if kind == "call_module":
            return self.root.get_submodule(target)(*a, **k)
        if kind == "call_method":
            return getattr(a[0], target)(*a[1:], **k)
        if kind == "call_function":
            return target(*a, **k)
        return None


def make_value_tracer(base: type, inputs: dict[str, Any], leaves: frozenset[int] = frozenset(),
                      domain: Any = None) -> Any:
    """A tracer class derived from ``base`` (capture's leaf rules) that carries sample values.

    ``domain`` (``intervals.Domain``: declared value ranges and dims) lets a branch on tensor data
    be decided when the ranges prove its outcome (``branches.decide``).

    ``computing`` is set while a sample value is evaluated, so module calls inside that
    evaluation run eagerly instead of being recorded.
    """
    from seqgate.export.torch.asserts import assertion_outcome
    from seqgate.export.torch.branches import Decisions, decide
    from seqgate.export.torch.intervals import Domain

    proxy_class = _proxy_class()

    class ValueTracer(_SampleValues, base):  # type: ignore[misc, valid-type]
        def __init__(self, **kwargs: Any) -> None:
            super().__init__(**kwargs)
            self.inputs = inputs
            self.values: dict[Any, Any] = {}
            self.computing = False
            self.decisions = Decisions()
            self.domain = domain or Domain()

        def to_bool(self, obj: Any) -> bool:
            held = assertion_outcome(self.skipped)  # an `assert` is traced past (asserts.py)
            return decide(self, obj, self.decisions) if held is None else held

        def proxy(self, node: Any) -> Any:
            return proxy_class(node, self)

        def is_leaf_module(self, m: Any, qualname: str) -> bool:
            return id(m) in leaves or super().is_leaf_module(m, qualname)

        def call_module(self, m: Any, forward: Any, args: Any, kwargs: Any) -> Any:
            if self.computing:
                return forward(*args, **kwargs)
            return self.as_items(super().call_module(m, forward, args, kwargs))

        def getattr(self, attr: str, attr_val: Any, parameter_proxy_cache: dict[str, Any]) -> Any:
            if self.computing:
                return attr_val
            return super().getattr(attr, attr_val, parameter_proxy_cache)

    return ValueTracer


def sample_inputs(module: Any, params: list[str], concrete: dict[str, Any],
                  user: dict[str, tuple[int | str, ...]], label: str) -> dict[str, tuple[int | str, ...]]:
    """Dims of each tensor input: ``--input`` where given, else ``[batch, time, I]`` from the first
    recurrent module or cell (a loop's input is read one step at a time, so fx cannot see it)."""
    from torch import nn

    dims: dict[str, tuple[int | str, ...]] = {}
    guess: int | None = None
    for m in module.modules():
        size = getattr(m, "input_size", None)  # nn.RNNBase, nn.RNNCellBase, most hand-written cells
        if isinstance(m, nn.RNNBase | nn.RNNCellBase) or (isinstance(size, int) and m is not module):
            guess = int(size)  # type: ignore[arg-type]
            break
    missing = []
    for name in params:
        if name in concrete:
            continue
        if name in user:
            dims[name] = user[name]
        else:
            missing.append(name)
    if len(missing) == 1 and guess is not None:
        dims[missing[0]] = ("batch", "time", guess)
    elif missing:
        raise BadInputError(
            f"{label} runs a recurrent cell in a Python loop or branches on sizes; seqgate traces it on "
            f"sample inputs and "
            f"cannot infer the shape of forward() input(s) {', '.join(missing)}. Pass --input "
            f"NAME:DIM,DIM,... for each, e.g. --input {missing[0]}:batch,time,8.")
    return dims


def loop_trace(module: Any, base_tracer: type, concrete: dict[str, Any], params: list[str],
               dims: dict[str, tuple[int | str, ...]], user_cells: list[Any], label: str,
               declared: dict[str, Any] | None = None) -> Any:
    """The folded GraphModule (module docstring: trace twice, fold, prove the graphs equal).

    ``user_cells`` are traced as leaves; one that is not part of a folded loop is traced again
    inlined (a shared block called twice stays an ordinary part of the graph). Beside a built-in
    cell, every user cell candidate is such a leaf too (a user cell's loop feeding an
    ``nn.GRUCell`` loop).
    """
    from seqgate.export.torch.branches import compare
    from seqgate.export.torch.inputs import Plan
    from seqgate.export.torch.intervals import Domain
    from seqgate.export.torch.loopfold import canonical
    from seqgate.export.torch.samples import sample_args, symbol_values

    specs = [_spec(n, d, (declared or {}).get(n)) for n, d in dims.items()]
    domain = Domain({s.name: (s.low, s.high) for s in specs if getattr(s, "low", None) is not None}, dict(dims))
    plan = Plan(params=params, concrete=concrete, inputs=specs)
    leaves = frozenset(id(m) for m in (user_cell_candidates(module) if has_cells(module) else user_cells))
    sizes_ab = symbol_values(specs)
    samples = [dict(zip(params, sample_args(plan, sizes, seed), strict=True))
               for sizes, seed in zip(sizes_ab, (0, 1), strict=True)]
    notes: list[dict[str, Any]] = [{}, {}]  # cells called per step but not folded, per sample
    while True:  # both traces with the same leaves: the set only shrinks, so this ends
        traced = [_folded_trace(module, base_tracer, concrete, args, leaves, label, domain) for args in samples]
        for note, t in zip(notes, traced, strict=True):
            note.update(t[3])
        settled = traced[0][2] & traced[1][2]
        if settled == leaves:
            break
        leaves = settled
    graphs = [t[0] for t in traced]
    decided = [t[1] for t in traced]
    # without a cell loop to fold, a size read as a Python number must be the same at both sizes
    numbers = not user_cells and not has_cells(module)
    compare(decided[0], decided[1], *sizes_ab, dims, numbers, label)
    a, b = canonical(graphs[0]), canonical(graphs[1])
    if a != b:
        why = _unfolded_cell(type(module).__name__, notes)
        raise UnsupportedModelError(label, [why or _difference(graphs[0], graphs[1], a, b)])
    return graphs[0]


def _spec(name: str, dims: tuple[int | str, ...], declared: Any) -> Any:
    """The sample spec of one input: ``--input``'s dtype and value range when it gave them."""
    from seqgate.export.torch.inputs import InputSpec

    if declared is None or declared.dtype is None:
        return InputSpec(name, dims)
    return InputSpec(name, dims, declared.dtype, low=declared.low, high=declared.high)


def _folded_trace(module: Any, base_tracer: type, concrete: dict[str, Any], args: dict[str, Any],
                  leaves: frozenset[int], label: str,
                  domain: Any = None) -> tuple[Any, Any, frozenset[int], dict[str, Any]]:
    """Trace with ``leaves`` kept whole, fold cell loops; retrace inlining every user cell that
    was not part of a folded loop until none is left. Returns the graph, its decisions, the leaves
    it ended with (a shared block called twice stays an ordinary part of the graph) and, for each
    cell called more than once but not folded, (calls, class, where its next state comes from)."""
    from seqgate.export.torch.loopfold import cell_loop_class, fold_loops

    notes: dict[str, tuple[int, str, str]] = {}
    while True:
        tracer = make_value_tracer(base_tracer, args, leaves, domain)
        gm, values, decisions = _trace_once(module, tracer, concrete, label)
        fold_loops(gm, values, lambda m, ls=leaves: isinstance(m, cell_classes()) or id(m) in ls, label)
        left = {id(gm.get_submodule(n.target)) for n in gm.graph.nodes
                if n.op == "call_module" and id(gm.get_submodule(n.target)) in leaves
                and not isinstance(gm.get_submodule(n.target), cell_loop_class())}
        if not left:
            return gm, decisions, leaves, notes
        for target, calls in _calls_by_target(gm).items():
            via = _unfolded_note(gm, calls) if len(calls) > 1 and id(gm.get_submodule(target)) in left else None
            if via is not None:
                notes[target] = (len(calls), type(gm.get_submodule(target)).__name__, via)
        leaves = leaves - left


def _trace_once(module: Any, tracer_cls: type, concrete: dict[str, Any],
                label: str) -> tuple[Any, dict[Any, Any], Any]:
    import torch.fx

    from seqgate.export.torch.asserts import SKIPPED
    from seqgate.export.torch.branches import RANGED, BranchError, DataDependent
    from seqgate.export.torch.packing import packing_leaves, unwrapped
    from seqgate.export.torch.subclassed import base_calls_traced
    from seqgate.export.torch.untraceable import SampleRunFailed, run_failure, untraceable

    try:
        with packing_leaves(module) as leaves, base_calls_traced(module):
            tracer = tracer_cls(autowrap_functions=leaves)
            tracer.record_stack_traces = True
            with factories_recorded(tracer):
                graph = unwrapped(tracer.trace(module, concrete_args=dict(concrete) or None), leaves)
    except DataDependent as e:
        raise BranchError(label, [e.unsupported]) from None
    except SeqgateError:
        raise
    except Exception as e:
        if run_failure(e):
            raise SampleRunFailed(label, [untraceable(module, e)], e) from None
        raise UnsupportedModelError(label, [untraceable(module, e)]) from None
    gm = torch.fx.GraphModule(tracer.root, graph, type(module).__name__)
    gm.meta[SKIPPED] = list(tracer.skipped.lines)
    gm.meta[RANGED] = list(tracer.decisions.ranged)
    return gm, tracer.values, tracer.decisions


@contextmanager
def factories_recorded(tracer: Any) -> Iterator[None]:
    """``torch.zeros(x.size(0), H)`` (and ``ones``, and ``full((x.size(0),), v)``) is recorded as a
    node (its size stays dynamic) instead of reading the sample's batch size; the function object
    in the node is the original."""
    import torch
    import torch.fx

    saved = {name: getattr(torch, name) for name in ("zeros", "ones", "full")}

    def wrap(orig: Any) -> Any:
        def factory(*size: Any, **kwargs: Any) -> Any:
            flat = list(size[0]) if len(size) == 1 and isinstance(size[0], list | tuple) else list(size)
            if orig is saved["full"] and size:  # full(size, fill_value): the size, then the fill
                flat = [*(size[0] if isinstance(size[0], list | tuple) else [size[0]]), *size[1:]]
            if getattr(tracer, "computing", False) or not any(isinstance(s, torch.fx.Proxy) for s in flat):
                return orig(*size, **kwargs)
            return tracer.create_proxy("call_function", orig, tuple(size), kwargs)
        return factory

    try:
        for name, orig in saved.items():
            setattr(torch, name, wrap(orig))
        yield
    finally:
        for name, orig in saved.items():
            setattr(torch, name, orig)


def _difference(ga: Any, gb: Any, a: list[Any], b: list[Any]) -> Unsupported:
    from seqgate.export.torch.values import source_line

    nodes_a = [n for n in ga.graph.nodes]
    nodes_b = [n for n in gb.graph.nodes]
    i = next((k for k, (x, y) in enumerate(zip(a, b, strict=False)) if x != y), min(len(a), len(b)))
    node = nodes_a[i] if i < len(nodes_a) else nodes_b[min(i, len(nodes_b) - 1)]
    line = source_line(node)
    what = ("the traced graph changes with the input's batch size or length "
            f"({len(a)} vs {len(b)} nodes; first difference at {node.name}"
            f"{' — ' + line if line else ''})")
    hint = ("a loop over time is exported only when each step is `state = cell(x[:, t], state)` "
            "for every t of the input's time axis, its outputs collected with torch.stack/torch.cat or "
            "only the last state used; build sizes from x.size(d) rather than Python numbers")
    return Unsupported(f"{type(ga).__name__}.forward", what, hint)


def _calls_by_target(gm: Any) -> dict[str, list[Any]]:
    out: dict[str, list[Any]] = {}
    for n in gm.graph.nodes:
        if n.op == "call_module":
            out.setdefault(str(n.target), []).append(n)
    return out


def _from_call(n: Any, call: Any) -> bool:
    """Is ``n`` the call's output or an item of it (``out[0]``, ``out[1][0]``)?"""
    import operator

    while n is not call:
        if not (hasattr(n, "op") and n.op == "call_function" and n.target is operator.getitem):
            return False
        n = n.args[0]
    return True


def _describe(n: Any, gm: Any) -> str:
    """``target (Class) at file:line`` of the op that made ``n`` (items taken out of it skipped)."""
    import operator

    from seqgate.export.torch.values import source_line

    while n.op == "call_function" and n.target is operator.getitem and hasattr(n.args[0], "op"):
        n = n.args[0]

    what = (f"{n.target} ({type(gm.get_submodule(n.target)).__name__})" if n.op == "call_module"
            else str(getattr(n.target, "__name__", n.target)))
    line = source_line(n)
    return what + (f" at {line}" if line else "")


def _unfolded_note(gm: Any, calls: list[Any]) -> str | None:
    """Why a cell called once per step was not folded: where its next step's state comes from."""
    import torch.fx

    first, second = calls[0], calls[1]
    foreign = [a for a in second.args[1:] if isinstance(a, torch.fx.Node) and not _from_call(a, first)]
    return _describe(foreign[0], gm) if foreign else None


def _unfolded_cell(root: str, notes: list[dict[str, tuple[int, str, str]]]) -> Unsupported | None:
    """A cell called once per time step in both traces (a different number of calls) whose loop
    was not folded into one op: name it and what its next step's state goes through."""
    for target, (n_a, cls, via) in notes[0].items():
        n_b = notes[1].get(target, (n_a, "", ""))[0]
        if n_b == n_a:
            continue
        what = (f"{target} ({cls}) runs once per time step ({n_a} and {n_b} calls at the two sample "
                f"lengths), but the state given to its next step is not its own output: it comes from "
                f"{via}, so the loop is not `state = cell(x[:, t], state)` and cannot be one op over a "
                f"dynamic time axis")
        hint = ("give the cell its own outputs back as its next state: move what is applied to the state "
                "between steps (a residual, a normalisation, stacking the layers' states) inside the cell's "
                "forward (seqgate then exports the loop as one Scan), or fix the time size with --input")
        return Unsupported(f"{root}.forward", what, hint)
    return None
