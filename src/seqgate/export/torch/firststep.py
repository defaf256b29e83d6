"""The first call of a user cell in a loop, when it differs from later calls: traced on its own.

``state = None; for t …: state = cell(x[:, t], state)`` calls the cell with no state (or other
arguments) at step 0 and with its previous output later. Whatever the cell does on that first
call (zeros, a learned initial state, ``h0 = tanh(W x0)``), the export is exact by *peeling*
the first step (``usercells.peeled_loop``):

- :func:`first_step`: the cell's ``forward`` traced with step 0's own arguments (``None`` and
  missing arguments fixed for the trace, as ``torch.fx`` ``concrete_args``), walked into a graph
  of its own and inlined on ``X[:, 0]`` (:func:`inline`); its outputs at the carried paths are
  the initial states of the loop over steps 1..T−1;
- :func:`branch_graph`: a sub-graph for an ONNX ``If`` (the loop over the remaining steps, or the
  T = 1 case) whose own names get a prefix, leaving the outer values it reads untouched.

Why an ``If`` and not a loop over zero steps: onnxruntime 1.32 crashes the process (SIGFPE) on a
``Scan`` over an empty axis, its LSTM gives zero ``Y_h`` rather than ``initial_h`` for T = 0, and
``onnx.reference`` fails on both (checked on this machine's stack).
"""

from __future__ import annotations

from typing import Any

from seqgate.errors import Refusal
from seqgate.export.core.builder import FLOAT, GraphBuilder
from seqgate.export.core.scanbody import prefix_names
from seqgate.export.torch.values import TV

Path = tuple[int, ...]


def trace_cell(capture: Any, cell: Any, concrete: dict[str, Any], label: str) -> Any:
    """The cell's ``forward`` as a cleaned fx GraphModule; ``concrete`` arguments fixed (``None``
    states); ``torch.zeros(x.size(0), H)`` keeps its batch size dynamic (``loops.factories_recorded``)."""
    import torch.fx

    from seqgate.export.torch.loops import factories_recorded

    tracer = capture.tracer_class()()
    try:
        with factories_recorded(tracer):
            graph = tracer.trace(cell, concrete_args=dict(concrete) or None)
        gm = torch.fx.GraphModule(cell, graph, type(cell).__name__)
    except Refusal:
        raise
    except Exception as e:
        raise Refusal(f"the cell's forward cannot be traced ({type(e).__name__})") from None
    return capture.clean(gm, label)


def _init_leaf(t: Any) -> int | None:
    return t[1] if isinstance(t, tuple) and len(t) == 2 and t[0] == "init" else None


def _first_plan(m: Any, x0: TV, init: list[Any], label: str) -> tuple[Any, dict[str, str]]:
    """The trace plan of step 0's call and {step-graph input: outer value} (module docstring)."""
    from seqgate.export.torch.inputs import InputSpec, forward_params

    plan = forward_params(m.cell, {}, label)
    args = tuple(m.template["first"])
    params = plan.params[1:]
    if len(args) > len(params) or x0.shape[1] is None:
        raise Refusal(f"the first call of {m.cell_name} passes arguments its forward does not name")
    specs = [InputSpec(plan.params[0], ("batch", int(x0.shape[1])))]
    feeds = {plan.params[0]: x0.name}
    concrete: dict[str, Any] = {}
    for a, name in enumerate(params):
        if a >= len(args):
            if name not in plan.concrete:
                raise Refusal(f"the first call of {m.cell_name} leaves out {name!r}, which has no default")
            concrete[name] = plan.concrete[name]
            continue
        t = args[a]
        leaves = [_init_leaf(t)] if _init_leaf(t) is not None else (
            [_init_leaf(u) for u in t] if isinstance(t, tuple | list) and t else [])
        if t is None or isinstance(t, bool | int | float | str):
            concrete[name] = t
        elif leaves and all(j is not None for j in leaves):
            states = [init[j] for j in leaves]  # type: ignore[index]
            dims = _state_dims(states)
            if dims is None:
                raise Refusal(f"the first call of {m.cell_name} passes {name!r} other than tensors of one "
                              "shape with one dynamic (batch) dim, such as [batch, H] or [1, batch, H]")
            parts = len(leaves) if isinstance(t, tuple | list) else 0
            spec = InputSpec(name, dims, parts=parts)
            specs.append(spec)
            feeds.update(zip(spec.onnx_names, [s.name for s in states], strict=True))
        else:
            raise Refusal(f"the first call of {m.cell_name} passes {name!r} in a form seqgate cannot trace",
                          "pass None, a tensor or a tuple of tensors")
    plan.concrete = concrete
    plan.inputs = specs
    return plan, feeds


def _state_dims(states: list[Any]) -> tuple[int | str, ...] | None:
    """The trace dims of first-call states: their shared shape with its one dynamic dim as batch
    (``[batch, H]``, or ``[1, batch, H]`` that the cell squeezes); None when they have no such shape."""
    if not states or any(not isinstance(s, TV) or s.shape != states[0].shape for s in states):
        return None
    shape = states[0].shape
    if sum(d is None for d in shape) != 1:
        return None
    return tuple("batch" if d is None else int(d) for d in shape)


def first_step(b: GraphBuilder, capture: Any, m: Any, x0: TV, init: list[Any],
               out_paths: list[Path]) -> list[TV]:
    """Step 0 of the loop traced for its own arguments and inlined on ``x0`` ([N, I]); the values
    at ``out_paths`` of what the cell returns (the loop's carried states)."""
    from seqgate.export.torch.inputs import record_runs

    label = f"{m.cell_name} ({type(m.cell).__name__}), first call"
    plan, feeds = _first_plan(m, x0, init, label)
    gm = trace_cell(capture, m.cell, plan.concrete, label)
    metas, _, _ = record_runs(gm, plan, label)
    sub = GraphBuilder(b.opset, f"{m.cell_name}_first", "torch")
    walk = capture.walk(sub, gm, metas)
    result = walk.run(plan)
    if walk.problems:
        raise Refusal("; ".join(p.line() for p in dict.fromkeys(walk.problems)))
    outs = []
    for k, path in enumerate(out_paths):
        v = leaf_at(result, path)
        if not isinstance(v, TV) or v.rank != 2:
            raise Refusal(f"the first call of {m.cell_name} returns a structure other than later calls'",
                          "return the same (h, c) / h structure on every call")
        sub.output(v.name, f"first_out_{k}", FLOAT, [None, None])
        outs.append(v)
    names = inline(b, sub.build({}, check=False).graph, feeds)
    return [TV(n, v.shape, v.dtype) for n, v in zip(names, outs, strict=True)]


def leaf_at(result: Any, path: Path) -> Any:
    """What a cell returned, at an index path (None where the structure has no such place)."""
    v = result
    for i in path:
        v = v[i] if isinstance(v, tuple | list) and i < len(v) else None
    return v


def inline(b: GraphBuilder, graph: Any, feeds: dict[str, str]) -> list[str]:
    """Copy ``graph``'s nodes and initializers into ``b`` with fresh names, its inputs read from
    the outer values ``feeds``; returns the outer names of its outputs."""
    from onnx import helper, numpy_helper

    names = dict(feeds)
    for init in graph.initializer:
        names[init.name] = b.const(numpy_helper.to_array(init), "first/" + init.name.rsplit("/", 1)[-1])
    for node in graph.node:
        attrs = {a.name: helper.get_attribute_value(a) for a in node.attribute}
        if any(a.type in (a.GRAPH, a.GRAPHS) for a in node.attribute):
            raise Refusal("the first call's step holds a sub-graph (a loop or branch inside the cell)")
        outs = [b.fresh("first/" + o.rsplit("/", 1)[-1]) if o else "" for o in node.output]
        names.update((o, n) for o, n in zip(node.output, outs, strict=True) if o)
        b.node(node.op_type, [names[i] if i else "" for i in node.input], outs, **attrs)
    return [names[o.name] for o in graph.output]


def branch_graph(sub: GraphBuilder, outs: list[tuple[str, int]], prefix: str) -> Any:
    """``sub``'s nodes as a sub-graph whose outputs are ``outs`` (value, rank); every name it
    makes itself gets ``prefix`` (names of outer values it reads stay as they are)."""
    for k, (value, rank) in enumerate(outs):
        sub.output(value, f"out_{k}", FLOAT, [None] * rank)
    graph = sub.build({}, check=False).graph
    own = {o for n in graph.node for o in n.output if o} | {i.name for i in graph.initializer}
    prefix_names(graph, prefix, own)
    return graph
