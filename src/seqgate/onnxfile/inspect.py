"""``seqgate inspect``: what an exported file holds, as one JSON-ready dict.

Fields: ``inputs``/``outputs`` (name, element type, dims — symbolic dims as strings),
``opset``, ``layers`` (one row per source layer: its ONNX nodes, parameters, MACs per step and
per sequence from ``seqgate.costs``), ``probes`` (the probe map), ``metadata`` (every
metadata_props entry except the two JSON tables already shown).
"""

from __future__ import annotations

import json
from typing import Any

import onnx

from seqgate.onnxfile.costs import node_costs
from seqgate.onnxfile.load import value_dims
from seqgate.onnxfile.probes import PROBE_MAP_KEY, read_metadata, read_probe_map


def _io(vis: Any) -> list[dict[str, Any]]:
    return [
        {"name": vi.name,
         "dtype": onnx.helper.tensor_dtype_to_np_dtype(vi.type.tensor_type.elem_type).name,
         "dims": value_dims(vi)}
        for vi in vis
    ]


def describe(model: onnx.ModelProto) -> dict[str, Any]:
    """The inspection dict (see module docstring)."""
    meta = read_metadata(model)
    costs = {c.node: c for c in node_costs(model)}
    by_name = {n.name: n for n in model.graph.node}
    init_sizes = {i.name: _prod(i.dims) for i in model.graph.initializer
                  if i.data_type == onnx.TensorProto.FLOAT}
    layer_rows: list[dict[str, Any]] = []
    listed: set[str] = set()
    for rec in json.loads(meta.get("seqgate.layers", "[]")):
        nodes = [n for n in rec["nodes"] if n in costs]
        listed.update(nodes)
        layer_rows.append(_layer_row(rec["name"], rec["kind"], nodes, costs, by_name, init_sizes))
    rest = [n.name for n in model.graph.node if n.name not in listed]
    if rest:
        layer_rows.append(_layer_row("(graph glue)", "", rest, costs, by_name, init_sizes))
    probes = [
        {"name": p.name, "kind": p.kind, "layer": p.layer, "direction": p.direction,
         "value": p.value, "node": p.node, "axes": p.axes}
        for p in read_probe_map(model)
    ]
    return {
        "inputs": _io(model.graph.input),
        "outputs": _io(model.graph.output),
        "opset": next((o.version for o in model.opset_import if o.domain in ("", "ai.onnx")), None),
        "ir_version": model.ir_version,
        "producer": f"{model.producer_name} {model.producer_version}".strip(),
        "layers": layer_rows,
        "totals": {
            # each initializer once, however many layers (or calls of one module) read it
            "params": sum(init_sizes[i] for i in {i for n in model.graph.node for i in n.input
                                                  if i in init_sizes}),
            "macs_per_step": sum(r["macs_per_step"] for r in layer_rows),
            "macs_per_sequence": sum(r["macs_per_sequence"] for r in layer_rows),
        },
        "probes": probes,
        "metadata": {k: v for k, v in meta.items() if k not in (PROBE_MAP_KEY, "seqgate.layers")},
    }


def _layer_row(name: str, kind: str, nodes: list[str], costs: dict[str, Any],
               by_name: dict[str, onnx.NodeProto], init_sizes: dict[str, int]) -> dict[str, Any]:
    # a row counts every initializer its nodes read; the totals count each initializer once
    inits = {i for n in nodes for i in by_name[n].input if i in init_sizes}
    return {
        "layer": name,
        "kind": kind,
        "nodes": [by_name[n].op_type for n in nodes],
        "node_names": nodes,
        "params": sum(init_sizes[i] for i in inits),
        "macs_per_step": sum(costs[n].macs_per_step for n in nodes),
        "macs_per_sequence": sum(costs[n].macs_per_sequence for n in nodes),
    }


def _prod(dims: Any) -> int:
    p = 1
    for d in dims:
        p *= int(d)
    return p
