"""Keras 3 capture: walk a Functional/Sequential graph and map each layer through a table.

Contract:
- Graph inputs keep the Keras input names and order; outputs keep ``model.output_names``
  (a layer's second and later outputs become ``<layer>:<index>``, since Keras repeats the name).
- Batch is the symbolic dim ``batch`` and an unknown time axis ``time`` (``<input>_time``
  when several inputs have one), unless the model fixed them.
- Each operation is mapped by ``LAYERS[class name]`` (see ``layers`` and ``recurrent``); only
  classes defined inside Keras itself are looked up.
- Every refusal is collected: the walk goes on with placeholder values so that one
  :class:`UnsupportedModelError` lists every unsupported layer at once.
- Nested models (a Sequential used as a layer) are walked in place; their layer names get the
  nested model's name as a prefix (``encoder/lstm``).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from seqgate.errors import (
    BadInputError,
    MappingError,
    Refusal,
    SeqgateError,
    Unsupported,
    UnsupportedModelError,
)
from seqgate.export.core.builder import DimSpec, GraphBuilder, np_to_onnx_type
from seqgate.export.keras.call import KV, KerasCall
from seqgate.export.keras.masking import emit_mask_op, padding_metadata, refuse_unhandled_mask
from seqgate.sources.keras_graph import graph_nodes, is_nested


def export_keras_model(model: Any, opset: int, metadata: dict[str, str]) -> Any:
    """Build the ONNX ModelProto of a loaded Keras model (see module docstring)."""
    from seqgate.export.keras.layers import LAYERS

    graph = _functional_of(model)
    b = GraphBuilder(opset, graph_name=model.name, framework="keras")
    values: dict[int, KV] = {}
    dims = _input_dims(graph.inputs)
    for t, d in zip(graph.inputs, dims, strict=True):
        dtype = str(t.dtype)
        name = b.input(t.name, np_to_onnx_type(np.dtype(dtype)), d)
        values[id(t)] = KV(name, tuple(t.shape), dtype)
    problems: list[Unsupported] = []
    _walk(b, graph, values, prefix="", problems=problems, table=LAYERS)
    if problems:
        raise UnsupportedModelError(metadata.get("seqgate.source.file", model.name), problems)
    for t, oname in zip(graph.outputs, _output_names(model, graph), strict=True):
        v = values[id(t)]
        b.output(v.name, oname, np_to_onnx_type(np.dtype(v.dtype)), _output_dims(v.shape))
    return b.build({**metadata, **padding_metadata(graph)})


def _output_names(model: Any, graph: Any) -> list[str]:
    """``model.output_names``, made unique: Keras repeats a layer's name for each of its outputs
    (an LSTM with ``return_state`` gives ``['lstm', 'lstm', 'lstm']``). The first keeps the
    name; each repeat is ``<layer>:<index of that output of the layer>`` (``lstm``, ``lstm:1``,
    ``lstm:2``; only h and c give ``lstm``, ``lstm:2``); a clash with another output adds ``_k``.
    """
    names = list(getattr(model, "output_names", None) or [t.name for t in graph.outputs])
    seen: set[str] = set()
    out: list[str] = []
    for t, name in zip(graph.outputs, names, strict=True):
        unique = name
        if unique in seen:
            history = getattr(t, "_keras_history", None)
            index = int(history.tensor_index) if history is not None else len(out)
            unique, k = f"{name}:{index}", 0
            while unique in seen:
                k += 1
                unique = f"{name}:{index}_{k}"
        seen.add(unique)
        out.append(unique)
    return out


def _functional_of(model: Any) -> Any:
    if type(model).__name__ == "Sequential":
        f = getattr(model, "_functional", None)
        if f is None:
            raise BadInputError(
                f"Sequential model {model.name!r} has no Input, so its input shape is unknown. "
                f"Rebuild it with keras.Input(shape=...) as its first entry (or call "
                f"model.build(input_shape)) and save it again."
            )
        return f
    if not hasattr(model, "_nodes_by_depth"):
        raise UnsupportedModelError(
            model.name,
            [Unsupported(f"{model.name} ({type(model).__name__})", "subclassed Keras model",
                         "seqgate reads Functional and Sequential graphs; rebuild the model "
                         "with the Functional API")],
        )
    return model


def _input_dims(inputs: list[Any]) -> list[list[DimSpec]]:
    dynamic_time = [t for t in inputs if len(t.shape) >= 2 and t.shape[1] is None]
    out: list[list[DimSpec]] = []
    for t in inputs:
        dims: list[DimSpec] = []
        for axis, d in enumerate(t.shape):
            if d is not None:
                dims.append(int(d))
            elif axis == 0:
                dims.append("batch")
            elif axis == 1:
                dims.append("time" if len(dynamic_time) == 1 else f"{t.name}_time")
            else:
                dims.append(f"{t.name}_dim{axis}")
        out.append(dims)
    return out


def _output_dims(shape: tuple[int | None, ...]) -> list[DimSpec]:
    return ["batch" if (i == 0 and d is None) else d for i, d in enumerate(shape)]


def _walk(
    b: GraphBuilder,
    graph: Any,
    values: dict[int, KV],
    prefix: str,
    problems: list[Unsupported],
    table: dict[str, Any],
) -> None:
    """Visit ``graph``'s nodes in dependency order, mapping each through ``table``."""
    mask_only = _mask_only_nodes(graph)
    for node, layer in graph_nodes(graph):
        cls = type(layer).__name__
        full = f"{prefix}{layer.name}"
        ins = [values[id(t)] for t in node.input_tensors]
        if id(node) in mask_only:
            # mask arithmetic (Masking's not_equal/any, Embedding's not_equal): see masking.py
            names = emit_mask_op(b, node, ins, full, problems)
            for t, n in zip(node.outputs, names, strict=True):
                values[id(t)] = KV(n, tuple(t.shape), str(t.dtype))
            continue
        if is_nested(layer):
            _walk_nested(b, layer, node, ins, values, full, problems, table)
            continue
        call = KerasCall(
            layer=layer,
            name=full,
            inputs=ins,
            kwargs=dict(node.arguments.kwargs),
            outputs=list(node.outputs),
            args=tuple(node.arguments.args),
            values=values,
            table=table,
        )
        names = _map_one(b, call, cls, problems, table)
        for t, n in zip(node.outputs, names, strict=True):
            values[id(t)] = KV(n, tuple(t.shape), str(t.dtype))


def _is_layer(op: Any) -> bool:
    from seqgate.util.frameworks import import_keras

    return isinstance(op, import_keras().layers.Layer)


def _mask_only_nodes(graph: Any) -> set[int]:
    """ids of non-layer operation nodes whose outputs only ever feed ``mask=`` arguments.

    Keras records a Masking layer's mask computation (``not_equal``, ``any``) as graph nodes;
    they are not layers the user wrote, so they are not reported on their own.
    """
    consumers: dict[int, list[tuple[Any, bool]]] = {}
    for nodes in graph._nodes_by_depth.values():
        for node in nodes:
            mask = node.arguments.kwargs.get("mask") if node.arguments is not None else None
            mask_ids = {id(t) for t in (mask if isinstance(mask, list | tuple) else [mask]) if t is not None}
            for t in node.input_tensors:
                consumers.setdefault(id(t), []).append((node, id(t) in mask_ids))
    outputs = {id(t) for t in graph.outputs}
    found: set[int] = set()
    for depth in sorted(graph._nodes_by_depth):  # consumers (lower depth) are decided first
        for node in graph._nodes_by_depth[depth]:
            if getattr(node, "is_input", False) or _is_layer(node.operation):
                continue
            uses = [u for t in node.outputs for u in consumers.get(id(t), [])]
            if uses and not any(id(t) in outputs for t in node.outputs) and all(
                as_mask or id(user) in found for user, as_mask in uses
            ):
                found.add(id(node))
    return found


def _walk_nested(
    b: GraphBuilder,
    layer: Any,
    node: Any,
    ins: list[KV],
    values: dict[int, KV],
    full: str,
    problems: list[Unsupported],
    table: dict[str, Any],
) -> None:
    inner = _functional_of(layer)
    if len(inner.inputs) != len(ins):
        problems.append(Unsupported(f"{full} ({type(layer).__name__})",
                                    "nested model called with a different number of inputs"))
        return
    for t, v in zip(inner.inputs, ins, strict=True):
        values[id(t)] = v
    _walk(b, inner, values, prefix=f"{full}/", problems=problems, table=table)
    for t, outer in zip(inner.outputs, node.outputs, strict=True):
        v = values[id(t)]
        values[id(outer)] = KV(v.name, tuple(outer.shape), v.dtype)


def _map_one(
    b: GraphBuilder, call: KerasCall, cls: str, problems: list[Unsupported], table: dict[str, Any]
) -> list[str]:
    where = f"{call.name} ({cls})"
    fn = table.get(cls)
    module = type(call.layer).__module__
    if fn is None or not module.startswith("keras."):
        problems.append(Unsupported(where, f"layer class {cls} is not supported",
                                    "see DEVELOPERS.md for the supported layers"))
        return _placeholders(b, call)
    if not _is_layer(call.layer):
        problems.append(Unsupported(where, f"Keras operation {cls} (keras.ops) is not supported",
                                    "use the equivalent Keras layer"))
        return _placeholders(b, call)
    try:
        _check_dtype_policy(call.layer)
        refuse_unhandled_mask(cls, call)
        with b.layer(call.name, cls):
            names = fn(b, call)
    except Refusal as r:
        problems.append(Unsupported(where, r.what, r.hint))
        return _placeholders(b, call)
    except SeqgateError:
        raise
    except Exception as e:  # a bug in the mapping, not a property of the model: exit 4, never "unsupported"
        raise MappingError(call.name, cls, fn, e) from e
    if len(names) != len(call.outputs):
        raise MappingError(call.name, cls, fn, AssertionError(
            f"the mapping returned {len(names)} values for {len(call.outputs)} outputs"))
    return names


def _placeholders(b: GraphBuilder, call: KerasCall) -> list[str]:
    return [b.fresh(f"{call.name}/unsupported_{i}") for i in range(len(call.outputs))]


def _check_dtype_policy(layer: Any) -> None:
    policy = getattr(layer, "dtype_policy", None)
    compute = getattr(policy, "compute_dtype", "float32")
    if compute not in ("float32", None):
        raise Refusal(f"dtype policy computes in {compute}",
                      "seqgate exports float32 models; set the policy to float32 and save again")


def layer_weights(layer: Any) -> dict[str, np.ndarray[Any, Any]]:
    """The layer's weights by their short Keras names (``kernel``, ``bias``…), as NumPy."""
    return {w.name.split("/")[-1]: np.asarray(w.numpy()) for w in layer.weights}
