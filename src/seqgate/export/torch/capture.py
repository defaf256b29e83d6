"""PyTorch capture: trace ``forward`` with ``torch.fx.symbolic_trace`` and map each node by table.

Contract:
- The module is traced with a ``torch.fx.Tracer`` that keeps ``torch.nn`` modules (and
  subclasses of supported ones that do not override ``forward``) as leaves; the ONNX graph
  is then built by seqgate's own builder, node by node.
- Graph inputs are ``forward``'s parameters under their own names (``torch_inputs`` says which
  and with what dims; batch and time are the symbolic dims ``batch`` and ``time``).
- Graph outputs: a single returned tensor is ``output``; a returned tuple/list (nested ones
  are flattened depth first, e.g. ``out, (h, c)``) gives ``output_0``, ``output_1``, …; a
  returned dict gives one output per key, named by the key (``key_0``, ``key_1``, … when the
  value is itself a tuple), in insertion order (``seqgate.util.outputs``, the rule every
  runner follows too). A name that a forward parameter already uses gets a trailing ``_``.
- Each node is mapped by ``MODULES`` (module class), ``FUNCTIONS`` (function object) or
  ``METHODS`` (tensor method name), the tables of ``registry``. Shapes of intermediate
  tensors come from two sample runs.
- Every refusal is collected, with the module's qualified name or the function and the
  source line; the walk goes on with placeholder values so one
  :class:`~seqgate.errors.UnsupportedModelError` (exit 3) lists every problem. A forward that
  fx cannot trace (Python control flow on tensors, ``int(x.size(1))``, hand-built packed sequences) is
  also exit 3, naming the line and the construct to change.
- Recurrent modules: one native ONNX node per stacked layer, probes named
  ``<qualname>/l<k>/<direction>/<kind>`` (``<qualname>/call<i>/l<k>/…`` for the i-th extra
  call of the same module); see ``torch_modules``.
"""

from __future__ import annotations

import operator
from types import SimpleNamespace
from typing import Any

from seqgate.errors import MappingError, Refusal, SeqgateError, Unsupported, UnsupportedModelError
from seqgate.export.core.builder import GraphBuilder, np_to_onnx_type
from seqgate.export.torch.asserts import SKIPPED, SkippedAsserts, assertion_outcome, skipped_metadata
from seqgate.export.torch.declared import parse_inputs, range_metadata
from seqgate.export.torch.eagercheck import check_same_outputs
from seqgate.export.torch.inplace import inplace_problems
from seqgate.export.torch.inputs import (
    GuessedShapeError,
    Plan,
    TMeta,
    forward_params,
    guessed_shape_error,
    infer_inputs,
    output_dims,
    record_runs,
)
from seqgate.export.torch.mutation import state_kept
from seqgate.export.torch.samples import sample_args
from seqgate.export.torch.structured import (
    flat_forward,
    refuse_annotated,
    refuse_read_as_structure,
    renamed_metadata,
    structure_metadata,
)
from seqgate.export.torch.untraceable import SampleRunFailed, untraceable
from seqgate.export.torch.values import TV, UNKNOWN, Assigned, TorchCall, source_line
from seqgate.sources.spec import Source
from seqgate.util.outputs import flatten_with_paths


def export_torch_source(src: Source, opset: int, inputs: list[str] | None = None, **options: Any) -> Any:
    """Load ``src`` (``sources_torch.load_torch``) and return its ONNX ModelProto."""
    from seqgate.export.metadata import source_metadata
    from seqgate.sources.torch import load_torch_with_info
    from seqgate.util.frameworks import version_of

    if options:
        from seqgate.errors import BadInputError

        raise BadInputError(f"unknown PyTorch export option(s): {', '.join(sorted(options))}.")
    module, info = load_torch_with_info(src)
    meta = source_metadata(src, version_of("torch"))
    meta["seqgate.source.eval_mode"] = "true"
    meta["seqgate.source.was_training"] = "true" if info.was_training else "false"
    return export_torch_module(module, opset, meta, inputs=inputs, label=src.text)


def export_torch_module(
    module: Any,
    opset: int,
    metadata: dict[str, str],
    inputs: list[str] | None = None,
    label: str | None = None,
) -> Any:
    """The ONNX ModelProto of a loaded module (``eval()`` mode; writes to its tensors refused)."""
    module.eval()
    label = label or type(module).__name__
    with state_kept(module, label):
        return _export(module, opset, metadata, inputs, label)


def _export(module: Any, opset: int, metadata: dict[str, str], inputs: list[str] | None, label: str) -> Any:
    declared = parse_inputs(inputs)
    module, onnx_names = flat_forward(module, declared, label)  # --input PARAM.KEY: structured.py
    idents = {v: k for k, v in onnx_names.items()}
    declared = {idents.get(n, n): d for n, d in declared.items()}
    user = {n: d.dims for n, d in declared.items()}
    plan = forward_params(module, user, label)
    plan.declared, plan.onnx_names = declared, onnx_names
    refuse_annotated(module, user, label)
    gm = _loop_capture(module, plan, user, label, []) if _has_cells(module) else _trace_or_loops(
        module, plan, user, label)
    refuse_read_as_structure(module, gm, plan.params, plan.concrete, label)
    infer_inputs(gm, plan, user, label)
    metas, sa, sb = record_runs(gm, plan, label)
    check_same_outputs(module, gm, sample_args(plan, sa, 0), label)
    b = GraphBuilder(opset, graph_name=type(module).__name__, framework="torch")
    walk = _Walk(b, gm, metas)
    result = walk.run(plan)
    if walk.problems:  # a refused step inside an unrolled loop is reported once, not once per step
        raise UnsupportedModelError(label, list(dict.fromkeys(walk.problems)))
    _declare_outputs(b, result, metas.get(_output_node(gm).name), plan, sa, sb, label)
    from seqgate.export.torch.branches import RANGED, ranged_metadata
    from seqgate.export.torch.packing import padding_metadata

    inputs_meta = {**renamed_metadata(padding_metadata(plan), onnx_names),
                   **range_metadata(plan.inputs, onnx_names), **structure_metadata(module)}
    skipped = {**skipped_metadata(gm.meta.get(SKIPPED, [])), **ranged_metadata(gm.meta.get(RANGED, []))}
    return b.build({**metadata, **inputs_meta, **skipped})


# ----- tracing ----------------------------------------------------------------------------
def trace(module: Any, concrete: dict[str, Any], label: str) -> Any:
    """``torch.fx`` GraphModule of ``module`` with asserts on fixed defaults and dead code removed."""
    import torch.fx

    from seqgate.export.torch.packing import packing_leaves, unwrapped
    from seqgate.export.torch.subclassed import base_calls_traced

    try:
        with packing_leaves(module) as leaves, base_calls_traced(module):
            tracer = tracer_class()(autowrap_functions=leaves)
            tracer.record_stack_traces = True
            graph = unwrapped(tracer.trace(module, concrete_args=dict(concrete) or None), leaves)
        gm = torch.fx.GraphModule(tracer.root, graph, type(module).__name__)
        gm.meta[SKIPPED] = list(tracer.skipped.lines)
    except SeqgateError:
        raise
    except Exception as e:
        raise UnsupportedModelError(label, [untraceable(module, e)]) from None
    return clean(gm, label)


def tracer_class() -> type:
    """The fx tracer: modules with a mapping (``module_mapping``) are leaves."""
    import torch.fx

    from seqgate.export.torch.assign import record_setitem
    from seqgate.export.torch.modules import module_mapping

    class AssignableProxy(torch.fx.Proxy):
        __setitem__ = record_setitem  # x[idx] = v is recorded (fx's own Proxy refuses it)

    class Tracer(torch.fx.Tracer):
        def __init__(self, *args: Any, **kwargs: Any) -> None:
            super().__init__(*args, **kwargs)
            self.skipped = SkippedAsserts()

        def to_bool(self, obj: Any) -> bool:
            held = assertion_outcome(self.skipped)  # an `assert` is traced past (asserts.py)
            return super().to_bool(obj) if held is None else held

        def proxy(self, node: Any) -> Any:
            return AssignableProxy(node, self)

        def is_leaf_module(self, m: Any, qualname: str) -> bool:
            return super().is_leaf_module(m, qualname) or module_mapping(m) is not None

        def call_module(self, m: Any, forward: Any, args: Any, kwargs: Any) -> Any:
            # nn.Softmax(dim=-1)(scores): a parameter-free module built inside forward is inlined
            if built_in_forward(self.root, m):
                return forward(*args, **kwargs)
            return super().call_module(m, forward, args, kwargs)

    return Tracer


def built_in_forward(root: Any, m: Any) -> bool:
    """Is ``m`` a module without parameters or buffers that ``root`` does not hold (made per call)?"""
    if any(x is m for x in root.modules()):
        return False
    return next(m.parameters(), None) is None and next(m.buffers(), None) is None


def _has_cells(module: Any) -> bool:
    from seqgate.export.torch.loops import has_cells

    return has_cells(module)


def _trace_or_loops(module: Any, plan: Plan, user: dict[str, Any], label: str) -> Any:
    """fx's own trace; when it fails, the loop capture (user-written cells, or Python branches on
    sizes fixed for the export: ``branches``). Without cells, fx's refusal stands unless the
    loop capture names a branch or size that cannot be fixed."""
    from seqgate.export.torch.branches import BranchError
    from seqgate.export.torch.loops import user_cell_candidates

    try:
        return trace(module, plan.concrete, label)
    except UnsupportedModelError as original:
        cells = user_cell_candidates(module)
        if cells:
            return _loop_capture(module, plan, user, label, cells)
        mine = dict(user)
        try:
            gm = _loop_capture(module, plan, mine, label, [])
        except (BranchError, GuessedShapeError):
            raise
        except SeqgateError:
            raise original from None
        user.update(mine)
        return gm


def _loop_capture(module: Any, plan: Plan, user: dict[str, Any], label: str, cells: list[Any]) -> Any:
    """A forward that runs cells step by step: ``loops.loop_trace``; the sample dims become ``user``'s."""
    from seqgate.export.torch.loops import loop_trace, sample_inputs

    dims = sample_inputs(module, plan.params, plan.concrete, user, label)
    guessed = {n: d for n, d in dims.items() if n not in user}
    user.update(dims)
    try:
        gm = loop_trace(module, tracer_class(), plan.concrete, plan.params, dims, cells, label, plan.declared)
    except SampleRunFailed as e:
        if not guessed:
            raise
        how = "from the input_size of the model's first recurrent module or cell"
        raise guessed_shape_error(label, guessed, how, e.error) from None
    return clean(gm, label)


def clean(gm: Any, label: str) -> Any:
    """Drop asserts on fixed defaults, refuse dropped in-place ops, remove dead code."""
    import torch
    asserts = {torch._assert, torch.fx._symbolic_trace._assert_is_none}
    for n in list(gm.graph.nodes):
        if n.op == "call_function" and n.target in asserts:
            gm.graph.erase_node(n)
    problems = inplace_problems(gm)  # before dead-code removal, which would drop them silently
    if problems:
        raise UnsupportedModelError(label, problems)
    gm.graph.eliminate_dead_code()
    gm.recompile()
    return gm


def _output_node(gm: Any) -> Any:
    return next(n for n in gm.graph.nodes if n.op == "output")


# ----- the walk ---------------------------------------------------------------------------
class _Walk:
    """Visit the fx nodes in order; map each through its table (module docstring)."""

    def __init__(self, b: GraphBuilder, gm: Any, metas: dict[str, Any]) -> None:
        self.b = b
        self.gm = gm
        self.metas = metas
        self.values: dict[str, Any] = {}
        self.problems: list[Unsupported] = []
        self.calls: dict[str, int] = {}

    def run(self, plan: Plan) -> Any:
        specs = {s.name: s for s in plan.inputs}
        placeholders = [n for n in self.gm.graph.nodes if n.op == "placeholder"]
        for name, ph in zip(plan.params, placeholders, strict=True):
            self.values[ph.name] = self._placeholder(name, ph, specs, plan)
        result: Any = None
        for node in self.gm.graph.nodes:
            if node.op == "placeholder":
                continue
            if node.op == "output":
                result = self._resolve(node.args[0])
                break
            value = self._visit(node)
            if isinstance(value, Assigned):  # x[idx] = v: later readers of x read the new value
                old = self.values[node.args[0].name]
                self.values[node.args[0].name] = TV(value.value, old.shape, old.dtype)
                value = None
            self.values[node.name] = value
        return result

    def _placeholder(self, name: str, ph: Any, specs: dict[str, Any], plan: Plan) -> Any:
        if name in plan.concrete:
            return plan.concrete[name]
        spec = specs.get(name)
        if spec is None:
            return UNKNOWN
        shape = tuple(d if isinstance(d, int) else None for d in spec.dims)
        values = []
        for onnx_name in (plan.onnx_names.get(n, n) for n in spec.onnx_names):
            self.b.input(onnx_name, np_to_onnx_type(_np_dtype(spec.dtype)), list(spec.dims))
            values.append(TV(onnx_name, shape, spec.dtype))
        return tuple(values) if spec.parts else values[0]

    def _resolve(self, a: Any) -> Any:
        import torch.fx

        if isinstance(a, torch.fx.Node):
            return self.values[a.name]
        if isinstance(a, tuple):
            return tuple(self._resolve(x) for x in a)
        if isinstance(a, list):
            return [self._resolve(x) for x in a]
        if isinstance(a, dict):
            return {k: self._resolve(v) for k, v in a.items()}
        if isinstance(a, slice):
            return slice(self._resolve(a.start), self._resolve(a.stop), self._resolve(a.step))
        return a

    def _visit(self, node: Any) -> Any:
        args = self._resolve(tuple(node.args))
        kwargs = self._resolve(dict(node.kwargs))
        meta = self.metas.get(node.name)
        if node.op == "get_attr":
            return self._get_attr(node, meta)
        fn, where, kind, module = self._lookup(node)  # reports an unsupported node even after a refusal
        if fn is None or _has_unknown(args) or _has_unknown(kwargs):
            return UNKNOWN
        name = node.target if node.op == "call_module" else node.name
        index = self.calls.get(name, 0) if node.op == "call_module" else 0
        self.calls[name] = index + 1
        used = frozenset(_used_paths(node, meta))
        call = TorchCall(node, name, args, kwargs, meta, module, used, index, kind, CAPTURE)
        try:
            with self.b.layer(name, kind, record_empty=node.op == "call_module"):
                raw = fn(self.b, call)
        except Refusal as r:
            self.problems.append(Unsupported(where, r.what, r.hint))
            return UNKNOWN
        except SeqgateError:
            raise
        except Exception as e:  # a bug in the mapping: exit 4 naming it, never "unsupported"
            raise MappingError(where, kind, fn, e) from e
        try:
            return _attach(raw, meta, where)
        except AssertionError as e:
            raise MappingError(where, kind, fn, e) from e

    def _lookup(self, node: Any) -> tuple[Any, str, str, Any]:
        from seqgate.export.torch.functions import function_label
        from seqgate.export.torch.modules import module_mapping
        from seqgate.export.torch.registry import FUNCTIONS, METHODS

        line = source_line(node)
        at = f" at {line}" if line else ""
        if node.op == "call_module":
            m = self.gm.get_submodule(node.target)
            cls = type(m).__name__
            where = f"{node.target} ({cls}){at}"
            fn = module_mapping(m)
            if fn is None:
                self.problems.append(Unsupported(
                    where, f"module class {type(m).__module__}.{cls} is not supported",
                    "see DEVELOPERS.md for the supported modules"))
            return fn, where, cls, m
        if node.op == "call_method":
            label = f"Tensor.{node.target}"
            fn = METHODS.get(node.target) or METHODS.get(_out_of_place(node.target))
        else:
            label = function_label(node.target)
            fn = FUNCTIONS.get(node.target) if _hashable(node.target) else None
            if fn is None and getattr(node.target, "__name__", "").endswith("_"):
                fn = FUNCTIONS.get(_out_of_place_function(node.target))
        where = f"{label}{at}"
        if fn is None:
            self.problems.append(Unsupported(where, f"{label} is not supported",
                                             "see DEVELOPERS.md for the supported functions"))
        return fn, where, label, None

    def _get_attr(self, node: Any, meta: Any) -> Any:
        import numpy as np
        import torch

        obj: Any = self.gm
        for part in str(node.target).split("."):
            obj = getattr(obj, part)
        if not isinstance(obj, torch.Tensor):
            return obj
        arr = obj.detach().cpu().numpy()
        if arr.dtype == np.float64:
            arr = arr.astype(np.float32)
        with self.b.layer(str(node.target), "attribute"):
            name = self.b.const(arr, "value")
        shape = meta.shape if isinstance(meta, TMeta) else tuple(arr.shape)
        return TV(name, shape, str(arr.dtype))


def _out_of_place(name: str) -> str:
    """``relu_`` → ``relu`` (only reached for in-place ops that ``_inplace_problems`` accepted)."""
    return name[:-1] if name.endswith("_") and not name.startswith("__") else ""


def _out_of_place_function(fn: Any) -> Any:
    import torch
    import torch.nn.functional as F

    base = _out_of_place(getattr(fn, "__name__", ""))
    return getattr(F, base, None) or getattr(torch, base, None)


def _hashable(x: Any) -> bool:
    try:
        hash(x)
    except TypeError:
        return False
    return True


def _has_unknown(v: Any) -> bool:
    if v is UNKNOWN:
        return True
    if isinstance(v, list | tuple):
        return any(_has_unknown(x) for x in v)
    if isinstance(v, dict):
        return any(_has_unknown(x) for x in v.values())
    if isinstance(v, slice):
        return any(_has_unknown(x) for x in (v.start, v.stop, v.step))
    return False


def _used_paths(node: Any, meta: Any) -> set[tuple[int, ...]]:
    """Index paths of ``node``'s result read by its users (``()`` = read as a whole)."""
    paths: set[tuple[int, ...]] = set()
    for u in node.users:
        idx = u.args[1] if len(u.args) > 1 else None
        if (u.op == "call_function" and u.target is operator.getitem and u.args[0] is node
                and isinstance(idx, int) and isinstance(meta, tuple) and -len(meta) <= idx < len(meta)):
            i = idx % len(meta)
            paths |= {(i, *p) for p in _used_paths(u, meta[i])}
        else:
            paths.add(())
    return paths


def _attach(raw: Any, meta: Any, where: str) -> Any:
    """Turn a mapping's raw result (ONNX names, nested tuples) into values with shapes."""
    if isinstance(raw, str):
        if not isinstance(meta, TMeta):
            raise AssertionError(f"{where}: mapping returned a tensor where the module returned {meta!r}")
        return TV(raw, meta.shape, meta.dtype)
    if isinstance(raw, tuple | list) and isinstance(meta, tuple) and len(raw) == len(meta):
        return type(raw)(_attach(r, m, where) for r, m in zip(raw, meta, strict=True))
    if isinstance(raw, TV) and isinstance(meta, TMeta):
        return TV(raw.name, meta.shape, meta.dtype)
    return raw


def _np_dtype(name: str) -> Any:
    import numpy as np

    return np.dtype(name)


# ----- outputs ----------------------------------------------------------------------------
def _declare_outputs(
    b: GraphBuilder, result: Any, meta: Any, plan: Plan, sa: dict[str, int], sb: dict[str, int], label: str
) -> None:
    """Name and declare the graph outputs (rule in the module docstring)."""
    leaves: list[tuple[str, Any, Any]] = []
    for i, (path, v) in enumerate(flatten_with_paths(result)):
        if isinstance(result, dict):
            oname = "_".join(str(k) for k in path)
        else:
            oname = f"output_{i}" if path else "output"
        leaves.append((oname, v, _meta_at(meta, path)))
    taken = set(plan.params) | {n for s in plan.inputs for n in s.onnx_names} | set(plan.onnx_names.values())
    problems: list[Unsupported] = []
    for oname, v, m in leaves:
        while oname in taken:
            oname += "_"
        taken.add(oname)
        if not isinstance(v, TV):
            problems.append(Unsupported(f"output {oname!r}", f"forward returns a {type(v).__name__}, "
                                        f"not a tensor", "return tensors only"))
            continue
        dims = output_dims(m, sa, sb, oname) if isinstance(m, TMeta) else [None] * v.rank
        b.output(v.name, oname, np_to_onnx_type(_np_dtype(v.dtype)), dims)
    if problems:
        raise UnsupportedModelError(label, problems)


def _meta_at(meta: Any, path: tuple[Any, ...]) -> Any:
    """The traced metadata of the output at ``path`` (None where the structures differ)."""
    for k in path:
        if isinstance(meta, dict):
            meta = meta.get(k)
        elif isinstance(meta, tuple) and isinstance(k, int) and k < len(meta):
            meta = meta[k]
        else:
            return None
    return meta


# What a mapping that walks a sub-graph receives as ``TorchCall.capture``.
CAPTURE = SimpleNamespace(walk=_Walk, clean=clean, tracer_class=tracer_class)
