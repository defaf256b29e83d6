"""The streaming export: a post-pass that gives every recurrent node a state input and output.

Contract of a streaming file (written by :func:`make_streaming` from an ordinary export):

- Each forward RNN/GRU/LSTM node gets, per state tensor (``h``, and ``c`` for LSTM), a graph
  input ``<layer>/h_in`` and a graph output ``<layer>/h_out`` of shape ``[1, batch, hidden]``
  (ONNX's ``[directions, batch, hidden]``). The input's type is ONNX ``optional(tensor)``:
  leave it out (or pass a zero tensor) on the first call and the node starts from zeros
  (``OptionalHasElement`` → ``If`` → the given state or ``ConstantOfShape`` zeros of the
  current batch). onnxruntime accepts a missing optional input, ``None`` and a plain tensor
  (tests/test_streaming_export.py proves all three give the same numbers).
- The next call takes each ``*_out`` back as the matching ``*_in``. The metadata key
  ``seqgate.streaming`` (JSON) lists these pairs, so a caller loop needs no layer names::

      {"format": 1, "states": [{"layer", "state": "h"|"c", "input", "output", "shape",
        "node"}...], "outputs": [{"name", "time_axis": int|null}...], "inputs": [...]}

  ``time_axis`` null marks an output that summarises the stream so far (a final state,
  ``x[:, -1]``): after a call it is what the ordinary file gives for the whole stream so far.
- The time dim of every sequence input is made symbolic (a stateful Keras model may fix it),
  so a call may carry any number of new steps, 1 included.
- The graph must be causal (``seqgate.export.causal``): otherwise :class:`UnsupportedModelError`
  (exit 3) names every refused layer and why; the ordinary export is not affected.
- A recurrent node whose initial state already comes from the model's inputs is refused too:
  the ordinary file already takes and returns that state.
"""

from __future__ import annotations

import copy
import json
from dataclasses import dataclass
from typing import Any

import onnx
from onnx import TensorProto, helper

from seqgate.errors import Unsupported, UnsupportedModelError
from seqgate.export.causal import RECURRENT_OPS, NotCausal, Step, layer_of, sequence_inputs, time_kinds
from seqgate.onnxfile.probes import read_metadata, read_probe_map

STREAMING_KEY = "seqgate.streaming"
STATEFUL_KEY = "seqgate.source.stateful"
FORMAT = 1


@dataclass(frozen=True)
class StatePair:
    """One carried state: feed ``output`` of a call as ``input`` of the next."""

    layer: str
    state: str  # "h" | "c"
    input: str
    output: str
    shape: list[Any]
    node: str


def is_streaming(model: onnx.ModelProto) -> bool:
    return STREAMING_KEY in read_metadata(model)


def read_streaming(model: onnx.ModelProto) -> dict[str, Any] | None:
    """The ``seqgate.streaming`` record of a file (None for an ordinary file)."""
    raw = read_metadata(model).get(STREAMING_KEY)
    return None if raw is None else json.loads(raw)


def state_pairs(model: onnx.ModelProto) -> list[StatePair]:
    info = read_streaming(model) or {"states": []}
    return [StatePair(**s) for s in info["states"]]


def make_streaming(model: onnx.ModelProto, source: str, why: str = "") -> onnx.ModelProto:
    """A streaming copy of ``model`` (module docstring); ``source`` names the model in errors and
    ``why`` (if any) says why it is streamed."""
    try:
        kinds = time_kinds(model)
    except NotCausal as e:
        problem = Unsupported(e.where, e.why, _HINT)
        raise UnsupportedModelError(f"{source} for streaming{why}", [problem]) from None
    m = copy.deepcopy(model)
    g = m.graph
    problems, pairs = [], []
    prefixes = _probe_prefixes(m)
    slots = {(p.node, p.output_index): p.value for p in read_probe_map(m)}
    dims = _dims_of(model)
    for node in [n for n in g.node if n.op_type in RECURRENT_OPS]:
        if any(len(node.input) > i and node.input[i] for i in (5, 6)):
            problems.append(Unsupported(layer_of(node), "its initial state comes from the model's inputs",
                                        "the ordinary export already takes and returns that state; stream it"))
            continue
        pairs += _wire(g, node, prefixes.get(node.name, node.name), dims, slots)
    if problems:
        raise UnsupportedModelError(f"{source} for streaming{why}", problems)
    _sort_nodes(g)  # copies the nodes: done once, after every node was wired
    outputs = [{"name": o.name, "time_axis": _time_axis(kinds.get(o.name), o)} for o in model.graph.output]
    _free_time_dims(m, {o["name"]: o["time_axis"] for o in outputs})
    inputs = [{"name": n, "time_axis": a} for n, a in sequence_inputs(model).items()]
    record = {"format": FORMAT, "states": [p.__dict__ for p in pairs], "outputs": outputs, "inputs": inputs}
    meta = {**read_metadata(m), STREAMING_KEY: json.dumps(record, sort_keys=True)}
    del m.metadata_props[:]
    helper.set_model_props(m, {k: meta[k] for k in sorted(meta)})
    onnx.checker.check_model(m, full_check=True)
    onnx.shape_inference.infer_shapes(m, check_type=True, strict_mode=True)
    return m


_HINT = "export without --streaming (the ordinary file still works), or stream a causal model"


def _time_axis(kind: Any, out: onnx.ValueInfoProto) -> int | None:
    if isinstance(kind, Step):
        return len(out.type.tensor_type.shape.dim) + kind.axis
    return None


def _probe_prefixes(model: onnx.ModelProto) -> dict[str, str]:
    """Node name → the probe-name prefix of its layer (``lstm_1``, ``rnn/layer1``…)."""
    out = {}
    for p in read_probe_map(model):
        if p.kind == "hidden_final":
            out.setdefault(p.node, p.name.rsplit("/", 2)[0])
    return out


def _dims_of(model: onnx.ModelProto) -> dict[str, list[Any]]:
    g = onnx.shape_inference.infer_shapes(model).graph
    out = {}
    for vi in [*g.input, *g.value_info, *g.output]:
        if vi.type.HasField("tensor_type"):
            out[vi.name] = [d.dim_value if d.HasField("dim_value") else (d.dim_param or None)
                            for d in vi.type.tensor_type.shape.dim]
    return out


def _wire(g: onnx.GraphProto, node: onnx.NodeProto, prefix: str, dims: dict[str, list[Any]],
          slots: dict[tuple[str, int], str]) -> list[StatePair]:
    """Add the state inputs/outputs of one node (h at input 5 / output 1, c at 6 / 2); an empty
    output slot gets the name the probe map gives it (``slots``), so probes still fit."""
    hidden = next(a.i for a in node.attribute if a.name == "hidden_size")
    x_dims = dims.get(node.input[0]) or [None, None, None]
    batch = x_dims[1] if len(x_dims) > 1 and x_dims[1] else "batch"
    states = [("h", 5, 1)] + ([("c", 6, 2)] if node.op_type == "LSTM" else [])
    pairs = []
    for state, in_index, out_index in states:
        name_in, name_out = f"{prefix}/{state}_in", f"{prefix}/{state}_out"
        shape = [1, batch, hidden]
        start = _optional_state(g, node, name_in, shape)
        while len(node.input) <= in_index:
            node.input.append("")
        node.input[in_index] = start
        while len(node.output) <= out_index:
            node.output.append("")
        if not node.output[out_index]:
            node.output[out_index] = slots.get((node.name, out_index), f"{node.name}/{state}_state")
        g.node.append(helper.make_node("Identity", [node.output[out_index]], [name_out],
                                       name=f"streaming/{name_out}", doc_string=node.doc_string))
        g.output.append(helper.make_tensor_value_info(name_out, TensorProto.FLOAT, shape))
        pairs.append(StatePair(prefix, state, name_in, name_out, shape, node.name))
    return pairs


def _optional_state(g: onnx.GraphProto, node: onnx.NodeProto, name: str, shape: list[Any]) -> str:
    """Graph input ``name`` of type optional(tensor) and the value that is it, or zeros when absent."""
    tensor = helper.make_tensor_type_proto(TensorProto.FLOAT, shape)
    g.input.append(helper.make_value_info(name, helper.make_optional_type_proto(tensor)))
    s = f"streaming/{name}"
    x = node.input[0]
    hidden = int(shape[2])
    const = [helper.make_node("Constant", [], [f"{s}/{k}"],
                              value=helper.make_tensor(k, TensorProto.INT64, [1], [v]))
             for k, v in (("one", 1), ("hidden", hidden), ("start", 1), ("end", 2))]
    zeros = helper.make_graph([
        *const,
        helper.make_node("Shape", [x], [f"{s}/xshape"]),
        helper.make_node("Slice", [f"{s}/xshape", f"{s}/start", f"{s}/end"], [f"{s}/batch"]),
        helper.make_node("Concat", [f"{s}/one", f"{s}/batch", f"{s}/hidden"], [f"{s}/shape"], axis=0),
        helper.make_node("ConstantOfShape", [f"{s}/shape"], [f"{s}/zeros"],
                         value=helper.make_tensor("zero", TensorProto.FLOAT, [1], [0.0])),
    ], f"{s}/absent", [], [helper.make_tensor_value_info(f"{s}/zeros", TensorProto.FLOAT, shape)])
    given_out = helper.make_tensor_value_info(f"{s}/given", TensorProto.FLOAT, shape)
    given = helper.make_graph([helper.make_node("OptionalGetElement", [name], [f"{s}/given"])],
                              f"{s}/given", [], [given_out])
    g.node.append(helper.make_node("OptionalHasElement", [name], [f"{s}/has"], name=f"{s}/has"))
    g.node.append(helper.make_node("If", [f"{s}/has"], [f"{s}/initial"], name=f"{s}/initial",
                                   then_branch=given, else_branch=zeros))
    return f"{s}/initial"


def _sort_nodes(g: onnx.GraphProto) -> None:
    """Topological order (the added nodes were appended at the end); ties keep their order."""
    produced = {o for n in g.node for o in n.output if o}
    ready = {i.name for i in g.input} | {i.name for i in g.initializer}
    pending, ordered = list(g.node), []
    while pending:
        rest = []
        for n in pending:
            needs = [i for i in _reads(n) if i in produced]
            if all(i in ready for i in needs):
                ordered.append(n)
                ready.update(o for o in n.output if o)
            else:
                rest.append(n)
        if len(rest) == len(pending):
            raise ValueError("cycle while ordering the streaming graph")
        pending = rest
    del g.node[:]
    g.node.extend(ordered)


def _reads(n: onnx.NodeProto) -> list[str]:
    """Inputs of ``n`` and values its subgraphs read from the outer graph."""
    names = [i for i in n.input if i]
    for a in n.attribute:
        if a.type == onnx.AttributeProto.GRAPH:
            names += [i for sub in a.g.node for i in sub.input if i]
    return names


def _free_time_dims(m: onnx.ModelProto, out_axes: dict[str, int | None]) -> None:
    """Make the time axis of sequence inputs and per-step outputs symbolic: a call may carry any
    number of steps. Other value infos are dropped (shape inference recomputes them)."""
    axes = {**sequence_inputs(m), **{k: v for k, v in out_axes.items() if v is not None}}
    for vi in [*m.graph.input, *m.graph.output]:
        if vi.name in axes and vi.type.HasField("tensor_type"):
            d = vi.type.tensor_type.shape.dim[axes[vi.name]]
            if d.HasField("dim_value"):
                d.ClearField("dim_value")
                d.dim_param = "time"
    del m.graph.value_info[:]


def ordinary_view(model: onnx.ModelProto) -> onnx.ModelProto:
    """The ordinary graph inside a streaming file (state inputs, outputs and their nodes removed).

    It computes what the ordinary export computes: every node starts from zeros again.
    """
    pairs = state_pairs(model)
    ins, outs = {p.input for p in pairs}, {p.output for p in pairs}
    m = copy.deepcopy(model)
    g = m.graph
    keep = [n for n in g.node if not n.name.startswith("streaming/")]
    for n in keep:
        for i, v in enumerate(n.input):
            if v.startswith("streaming/"):
                n.input[i] = ""
    del g.node[:]
    g.node.extend(keep)
    kept_in = [i for i in g.input if i.name not in ins]
    kept_out = [o for o in g.output if o.name not in outs]
    del g.input[:]
    g.input.extend(kept_in)
    del g.output[:]
    g.output.extend(kept_out)
    meta = {k: v for k, v in read_metadata(m).items() if k != STREAMING_KEY}
    del m.metadata_props[:]
    helper.set_model_props(m, meta)
    return m
