"""A user-written cell (an ``nn.Module`` of Linear layers and elementwise ops) run over time → ONNX
``Scan``, or ONE native LSTM/GRU/RNN node when the step is proven to be one.

The loop is proven by ``loopfold`` (the cell's state is exactly its previous output); this module
builds the cell's step graph and asks ``core.cellmatch`` whether it is structurally a plain or
peephole LSTM, a GRU or an Elman RNN whose collected value is its hidden state. If so, one native
node over the time axis replaces the loop (same probes); otherwise one ``Scan`` over the dynamic
time axis whose body is the cell's own step:

- the cell's ``forward`` is traced with ``torch.fx`` (Linear etc. as leaves) and mapped by the
  same tables as any forward, into a separate graph: the Scan body;
- carried values: the leaves of the cell's output (``(h, c)`` → h, c; ``h`` → h); every leaf
  must be passed back as state (the loop's paths);
- step 0 with explicit initial states of the same structure starts the loop from them; a first
  call that differs (``state = None`` first, ``None if t == 0 else (h, c)``, fewer arguments) is
  *peeled* (:func:`peeled_loop`, ``firststep``): the cell traced for step 0's own arguments on
  ``X[:, 0]``, then ``If(T > 1)`` the loop above over ``X[:, 1:]`` from its outputs (the first
  output concatenated before the loop's sequence), else the first step alone — exact whatever
  the cell does without a state (zeros, a learned state, ``tanh(W x_0)``);
- scan input: X along the loop's axis (``scan_input_axes``); scan output: the collected leaf
  (or the first leaf when nothing is collected) stacked on the collector's dim;
- probes (``runtimes.torch_cells``): ``<cell>/forward/hidden_sequence`` (collected leaf per step),
  ``hidden_final`` and, for a second carried leaf, ``cell_final``.

Equation: ``S_0 = init``; ``S_t = cell(X[:, t], S_{t−1})``, ``Y[:, t] = S_t[h]`` — what the
Python loop computes, op for op (peeled: ``S_1 = cell(X[:, 0], <first call's arguments>)``).
"""

from __future__ import annotations

from typing import Any

from seqgate.errors import Refusal
from seqgate.export.core.builder import FLOAT, GraphBuilder
from seqgate.export.core.cellmatch import NativeCell, match_step
from seqgate.export.core.rnn_nodes import RecurrentCall, emit_recurrent
from seqgate.export.core.scanbody import order_inputs, prefix_names
from seqgate.export.torch.values import TV, TorchCall, want_tensor
from seqgate.onnxfile.probes import Probe

Path = tuple[int, ...]


def _paths(template: Any, out: list[tuple[Any, Path]], at: Path = ()) -> None:
    """(leaf, position) of every ("init", j) / ("path", p) leaf in an argument template."""
    if isinstance(template, tuple) and len(template) == 2 and template[0] in ("init", "path"):
        out.append((template, at))
    elif isinstance(template, list | tuple):
        for i, t in enumerate(template):
            _paths(t, out, (*at, i))


def _carried(m: Any) -> tuple[list[tuple[Path, Path, int]], bool]:
    """(output path, argument position, init index) of each carried leaf, in output order, and
    whether the first call must be peeled (it does not get an initial state for every carried
    leaf: no state, or other arguments; the init index is then unused)."""
    later: list[tuple[Any, Path]] = []
    first: list[tuple[Any, Path]] = []
    _paths(m.template["later"], later)
    _paths(m.template["first"], first)
    init_at = {pos: leaf[1] for leaf, pos in first if leaf[0] == "init"}
    peel = any(pos not in init_at for _, pos in later) or _shape(m.template["first"]) != _shape(
        m.template["later"])
    return sorted((leaf[1], pos, -1 if peel else init_at[pos]) for leaf, pos in later), peel


def _shape(template: Any) -> Any:
    """The argument structure with every state leaf alike (``None`` and constants kept)."""
    if isinstance(template, tuple) and len(template) == 2 and template[0] in ("init", "path"):
        return "state"
    if isinstance(template, list | tuple):
        return (type(template).__name__, *[_shape(t) for t in template])
    return repr(template)


def _seq_index(m: Any, out_paths: list[Path]) -> int:
    """Index of the collected value among the carried states, or -1 when the loop collects another
    output of the cell (``out, (h, c) = cell(x_t, (h, c))``: the step output at ``m.seq_path``)."""
    seq_path = m.seq_path if m.seq_path is not None else out_paths[0]
    return out_paths.index(seq_path) if seq_path in out_paths else -1


def _seq_path(m: Any, out_paths: list[Path], seq_index: int) -> Path:
    return out_paths[seq_index] if seq_index >= 0 else m.seq_path


def user_cell_loop(b: GraphBuilder, call: TorchCall) -> Any:
    """Emit the Scan or native node (module docstring); returns (collected sequence, last output
    structure). A first call that differs from later calls is peeled (:func:`peeled_loop`)."""
    m = call.module
    x = want_tensor(call.args[0], "input")
    if m.reverse or m.flipped:
        raise Refusal("a loop over a user cell from the last step to the first, or collected in reverse",
                      "run the loop forward over torch.flip(x, [1]) and flip the stacked outputs back")
    carried, peel = _carried(m)
    if x.rank != 3:
        raise Refusal("a user cell over tensors other than [batch, time, I] with [batch, H] states")
    init = list(call.args[1:])
    if not peel and any(want_tensor(init[j], "initial state").rank != 2 for _, _, j in carried):
        # e.g. an initial state [1, batch, H] that the cell squeezes, where later steps get [batch, H]
        peel, carried = True, [(p, pos, -1) for p, pos, _ in carried]
    if peel:
        return peeled_loop(b, call, carried)
    states = [want_tensor(init[j], "initial state") for _, _, j in carried]
    out_paths = [p for p, _, _ in carried]
    seq_index = _seq_index(m, out_paths)
    seq, finals, form, same = _loop(b, call.capture, m, x, states, carried, seq_index)
    return _finish_loop(b, m, seq, finals, out_paths, same, form, False)


def _finish_loop(b: GraphBuilder, m: Any, seq: str, finals: list[str], out_paths: list[Path], same: int,
                 form: str, peeled: bool) -> Any:
    """Probes, then (collected sequence, the cell's last output structure). A collected output
    that is another tensor than the carried states ends as its last step."""
    import numpy as np

    seq_path = _seq_path(m, out_paths, same)
    paths, names = list(out_paths), list(finals)
    if seq_path not in paths:
        paths.append(seq_path)
        names.append(b.op("Gather", [seq, b.scalar(-1, "last_step", np.int64)], axis=m.seq_dim))
    elif m.seq_path is not None and m.seq_path not in paths:  # ``return h, (h, c)``: out is h
        paths.append(m.seq_path)
        names.append(finals[same])
    _probes(b, m, (seq, names[paths.index(seq_path)]), finals, out_paths, seq_path, form, peeled)
    return (seq if m.seq_path is not None else None, _structure(paths, names))


def _loop(b: GraphBuilder, capture: Any, m: Any, x: TV, states: list[TV], carried: list[tuple[Path, Path, int]],
          seq_index: int) -> tuple[str, list[str], str, int]:
    """The loop over ``x``'s time axis from ``states``: ONE native node when ``core.cellmatch``
    proves the step, else a Scan. (collected sequence, final states in carried order, native form
    or "", index of the carried state the collected value is or -1)."""
    body, same = _body(b, capture, m, x, states, carried, seq_index)
    cell, _ = match_step(body, len(carried))
    if cell is not None and cell.h_state == same:
        seq, finals = _native(b, m, x, states, cell)
        return seq, finals, cell.form, same
    finals = [b.fresh("state") for _ in carried]
    seq = b.fresh("sequence")
    b.node("Scan", [s.name for s in states] + [x.name], [*finals, seq], body=body,
           num_scan_inputs=1, scan_input_axes=[m.axis], scan_output_axes=[m.seq_dim])
    return seq, finals, "", same


def peeled_loop(b: GraphBuilder, call: TorchCall, carried: list[tuple[Path, Path, int]]) -> Any:
    """The first step traced for its own arguments (``firststep``), then the loop over steps
    1..T−1 from its outputs: ``If(T > 1)`` runs that loop and concatenates the first step's output
    before the loop's sequence, else (T = 1) returns the first step alone. Exact for any first call."""
    import numpy as np

    from seqgate.export.torch.firststep import branch_graph, first_step

    m = call.module
    x = want_tensor(call.args[0], "input")
    out_paths = [p for p, _, _ in carried]
    seq_index = _seq_index(m, out_paths)
    x0 = b.op("Gather", [x.name, b.scalar(0, "step0", np.int64)], axis=m.axis)
    first = first_step(b, call.capture, m, TV(x0, (x.shape[0], x.shape[2]), x.dtype), list(call.args[1:]),
                       [*out_paths, _seq_path(m, out_paths, seq_index)])
    first, first_out = first[:-1], first[-1]
    rest = GraphBuilder(b.opset, f"{m.cell_name}_rest", "torch")
    x_shape = tuple(None if i == m.axis else d for i, d in enumerate(x.shape))
    x_rest = TV(rest.slice(x.name, [1], [int(np.iinfo(np.int64).max)], [m.axis]), x_shape, x.dtype)
    seq, finals, form, same = _loop(rest, call.capture, m, x_rest, first, carried, seq_index)
    head = rest.unsqueeze(first_out.name, [m.seq_dim])
    whole = rest.op("Concat", [head, seq], axis=m.seq_dim)
    then = branch_graph(rest, [(whole, 3), *[(f, 2) for f in finals]], f"{m.cell_name}/rest/")
    one = GraphBuilder(b.opset, f"{m.cell_name}_one_step", "torch")
    outs = [(one.unsqueeze(first_out.name, [m.seq_dim]), 3)]
    outs += [(one.op("Identity", [f.name]), 2) for f in first]
    other = branch_graph(one, outs, f"{m.cell_name}/one_step/")
    steps = b.op("Gather", [b.op("Shape", [x.name]), b.scalar(m.axis, "time_axis", np.int64)], axis=0)
    more = b.op("Greater", [steps, b.scalar(1, "one", np.int64)])
    seq_all, *last = b.node("If", [more], 1 + len(carried), then_branch=then, else_branch=other)
    return _finish_loop(b, m, seq_all, last, out_paths, same, form, True)


def _native(b: GraphBuilder, m: Any, x: TV, states: list[TV], cell: NativeCell) -> tuple[str, list[str]]:
    """The proven native node (``core.cellmatch``) over the loop's time axis: the collected
    sequence in the collector's layout and the final states in carried order."""
    xt = x.name if m.axis == 0 else b.transpose(x.name, [1, 0, 2])
    h0 = b.unsqueeze(states[cell.h_state].name, [0])
    c0 = b.unsqueeze(states[cell.c_state].name, [0]) if cell.c_state is not None else ""
    rc = RecurrentCall(kind=cell.kind, hidden=cell.hidden, direction="forward", packed=cell.packed,
                       activations=cell.activations, layer=m.cell_name)
    out = emit_recurrent(b, rc, xt, h0, c0, need_y=True, need_h=True, need_c=cell.kind == "lstm", probes=False)
    y = b.squeeze(out.y, [1])  # [T, N, H]
    seq = y if m.seq_dim == 0 else b.transpose(y, [1, 0, 2])
    finals = [""] * len(states)
    finals[cell.h_state] = b.squeeze(out.y_h, [0])
    if cell.c_state is not None:
        finals[cell.c_state] = b.squeeze(out.y_c, [0])
    return seq, finals


def _structure(paths: list[Path], names: list[str]) -> Any:
    """Rebuild the cell's output structure from leaf paths (() = a single tensor)."""
    if paths == [()]:
        return names[0]
    n = max(p[0] for p in paths) + 1
    parts: list[Any] = []
    for i in range(n):
        sub = [(p[1:], v) for p, v in zip(paths, names, strict=True) if p[0] == i]
        if not sub:
            raise Refusal("the cell returns values that are not carried as state")
        parts.append(_structure([p for p, _ in sub], [v for _, v in sub]))
    return tuple(parts)


def _body(b: GraphBuilder, capture: Any, m: Any, x: TV, states: list[TV],
          carried: list[tuple[Path, Path, int]], seq_index: int) -> Any:
    """The Scan body: the cell's traced forward, walked into its own graph by ``capture.walk``."""
    from seqgate.export.torch.firststep import trace_cell
    from seqgate.export.torch.inputs import InputSpec, forward_params, record_runs

    label = f"{m.cell_name} ({type(m.cell).__name__})"
    plan = forward_params(m.cell, {}, label)
    gm = trace_cell(capture, m.cell, {}, label)
    if len(plan.params) < 2:
        raise Refusal("a cell whose forward takes no state argument")
    plan.concrete = {}
    feature = (("batch", int(x.shape[2])) if x.shape[2] is not None else None)
    if feature is None:
        raise Refusal("the loop input's feature size is not fixed")
    specs = [InputSpec(plan.params[0], feature)]
    by_arg: dict[int, list[tuple[Path, int]]] = {}
    for k, (_, pos, _) in enumerate(carried):
        by_arg.setdefault(pos[0], []).append((pos[1:], k))
    for a, name in enumerate(plan.params[1:]):
        leaves = sorted(by_arg.get(a, []))
        if not leaves:
            raise Refusal(f"the cell's argument {name!r} is not carried state")
        dims = ("batch", int(states[leaves[0][1]].shape[1] or 0))
        specs.append(InputSpec(name, dims, parts=len(leaves) if leaves[0][0] else 0))
    plan.inputs = specs
    metas, _, _ = record_runs(gm, plan, label)
    sub = GraphBuilder(b.opset, graph_name=f"{m.cell_name}_step", framework="torch")
    walk = capture.walk(sub, gm, metas)
    result = walk.run(plan)
    if walk.problems:
        raise Refusal("; ".join(p.line() for p in dict.fromkeys(walk.problems)))
    return _finish_body(sub, result, specs, carried, (seq_index, m.seq_path), m.cell_name)


def _leaf(result: Any, path: Path) -> TV:
    from seqgate.export.torch.firststep import leaf_at

    v = leaf_at(result, path)
    if not isinstance(v, TV):
        raise Refusal("the cell returns something other than tensors")
    return v


def _finish_body(sub: GraphBuilder, result: Any, specs: list[Any], carried: list[tuple[Path, Path, int]],
                 collected: tuple[int, Path | None], prefix: str) -> tuple[Any, int]:
    """Declare body outputs (new states, then the scan output) and order the inputs as Scan wants.
    Returns the body and the index of the carried state the scan output is (-1: another tensor).
    ``collected`` = (index among the carried states or -1, the collected path of the cell's output)."""
    outs = [_leaf(result, out_path) for out_path, _, _ in carried]
    for k, v in enumerate(outs):
        sub.output(v.name, f"state_out_{k}", FLOAT, [None] * v.rank)
    seq_index, seq_path = collected
    if seq_index < 0 and seq_path is not None:  # the same tensor as a carried state (out is h)?
        seq_src = _leaf(result, seq_path)
        seq_index = next((k for k, v in enumerate(outs) if v.name == seq_src.name), -1)
    else:
        seq_src = outs[seq_index]
    sub.output(seq_src.name, "step_out", FLOAT, [None] * seq_src.rank)
    graph = sub.build({}, check=False).graph
    names = [n for s in specs for n in s.onnx_names]
    state_inputs: list[str] = []
    for _, pos, _ in carried:
        spec = specs[1 + pos[0]]
        state_inputs.append(spec.onnx_names[pos[1]] if spec.parts else spec.onnx_names[0])
    order = [*state_inputs, names[0]]
    order_inputs(graph, order)
    prefix_names(graph, f"{prefix}/step/")
    return graph, seq_index


def _probes(b: GraphBuilder, m: Any, collected: tuple[str, str], finals: list[str], paths: list[Path],
            seq_path: Path, form: str = "", peeled: bool = False) -> None:
    """Per-step and final state probes on the Scan's (or the native node's) outputs (Unsqueeze
    adds the direction axis); ``collected`` = (collected sequence, its last step); ``form`` names the
    recognised native form, "" for a Scan."""
    seq, seq_final = collected
    src = {"framework": "torch", "module": m.cell_name, "module_type": type(m.cell).__name__,
           "cell_calls": list(m.calls), "h_path": list(seq_path), "exported_as": form or "Scan"}
    if peeled:
        src["first_step"] = "peeled"
    # a collected output that is no carried state: its last step is the final, no cell state named
    others = [p for p in paths if p != seq_path] if seq_path in paths else []
    if others:
        src["c_path"] = list(others[0])
    seq_axis = 2 if m.seq_dim == 1 else 1
    y = b.unsqueeze(seq, [seq_axis])
    kinds = [("hidden_sequence", y, "NTDH" if m.seq_dim == 1 else "TNDH", b.last_node_name)]
    h = b.unsqueeze(seq_final, [1])
    kinds.append(("hidden_final", h, "NDH", b.last_node_name))
    if others:
        c = b.unsqueeze(finals[paths.index(others[0])], [1])
        kinds.append(("cell_final", c, "NDH", b.last_node_name))
    for kind, value, axes, node in kinds:
        b.probe(Probe(name=f"{m.cell_name}/forward/{kind}", kind=kind, layer=m.cell_name, direction="forward",
                      direction_index=0, node=node, output_index=0, value=value, axes=axes, source=src))
