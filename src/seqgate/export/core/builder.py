"""The one place that makes ONNX nodes, initializers, names, probes and metadata.

Contract:
- Names are stable: a value, node or initializer is named ``<scope>/<hint>`` where scope is
  the source layer's name; a clash gets ``_1``, ``_2``… in creation order. Two builds of the
  same source therefore give byte-identical files.
- Every node's ``doc_string`` names the source layer (``keras layer 'lstm_1' (LSTM)``).
- Initializers are written sorted by name; attributes are sorted by ``onnx.helper``.
- Helpers that changed signature across opsets (Squeeze, Unsqueeze, Reduce*, Slice) take
  Python lists and emit the form the target opset wants.
- A probe names the node output that holds an internal state (see ``seqgate.probes``). A probe
  value may be an output slot the deployable graph leaves empty (``""``); the verifier fills it
  on an in-memory copy, so the shipped file computes only what the model returns.
- :meth:`GraphBuilder.build` renames each graph output's producing value to the output's name
  when that is safe, otherwise inserts an Identity, then checks the model with
  ``onnx.checker.check_model(full_check=True)`` and strict shape inference.
"""

from __future__ import annotations

import json
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

from seqgate.onnxfile.probes import PROBE_MAP_KEY, Probe

DimSpec = int | str | None


@dataclass
class _Scope:
    name: str
    kind: str
    framework: str
    nodes: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class LayerRecord:
    """One source layer and the ONNX nodes made for it (kept in ``seqgate.layers``)."""

    name: str
    kind: str
    nodes: tuple[str, ...]


@dataclass(frozen=True)
class Value:
    """A value in the graph being built: ONNX name, static shape from the source (None = dynamic), dtype."""

    name: str
    shape: tuple[int | None, ...]
    dtype: str = "float32"

    @property
    def rank(self) -> int:
        return len(self.shape)


SHARE_MIN = 2  # arrays, not float scalars (whose names readers of the graph rely on)


def np_to_onnx_type(dtype: np.dtype[Any] | type) -> int:
    """ONNX TensorProto element type of a NumPy dtype."""
    return helper.np_dtype_to_tensor_dtype(np.dtype(dtype))


def make_value_info(name: str, elem_type: int, dims: Sequence[DimSpec]) -> onnx.ValueInfoProto:
    """A tensor value info; ``None`` dims are written as unknown (rank is always kept)."""
    shape: list[int | str | None] = [d for d in dims]
    return helper.make_tensor_value_info(name, elem_type, shape)


class GraphBuilder:
    """Accumulates one ONNX graph. See the module docstring for the naming contract."""

    def __init__(self, opset: int, graph_name: str, framework: str) -> None:
        self.opset = opset
        self.graph_name = graph_name
        self.framework = framework
        self._names: set[str] = set()
        self._nodes: list[onnx.NodeProto] = []
        self._inits: dict[str, onnx.TensorProto] = {}
        self._by_content: dict[tuple[str, tuple[int, ...], bytes], str] = {}
        self._inputs: list[onnx.ValueInfoProto] = []
        self._outputs: list[tuple[str, str, int, list[DimSpec]]] = []
        self._probes: list[Probe] = []
        self._scope: _Scope | None = None
        self._layers: list[LayerRecord] = []
        self._producer: dict[str, int] = {}

    # ----- naming and scopes -------------------------------------------------------------
    def fresh(self, hint: str) -> str:
        """A new unique name ``<scope>/<hint>`` (or ``hint`` outside a scope)."""
        base = f"{self._scope.name}/{hint}" if self._scope else hint
        name, k = base, 0
        while name in self._names:
            k += 1
            name = f"{base}_{k}"
        self._names.add(name)
        return name

    def reserve(self, name: str) -> str:
        """Claim an exact name (graph inputs); fail loudly on a clash."""
        if name in self._names:
            raise ValueError(f"ONNX name {name!r} is used twice")
        self._names.add(name)
        return name

    @contextmanager
    def layer(self, name: str, kind: str, record_empty: bool = True) -> Iterator[None]:
        """Scope for one source layer: names get its prefix, nodes its doc_string.

        ``record_empty=False`` leaves the scope out of ``seqgate.layers`` when it made no node
        (a traced function that only reads a size or picks a tuple element).
        """
        outer = self._scope
        self._scope = _Scope(name, kind, self.framework)
        try:
            yield
        finally:
            s = self._scope
            self._scope = outer
            if s.nodes or record_empty:
                self._layers.append(LayerRecord(s.name, s.kind, tuple(s.nodes)))

    # ----- graph pieces ------------------------------------------------------------------
    def input(self, name: str, elem_type: int, dims: Sequence[DimSpec]) -> str:
        """Declare a graph input named exactly ``name``."""
        self.reserve(name)
        self._inputs.append(make_value_info(name, elem_type, dims))
        return name

    def const(self, array: np.ndarray[Any, Any], hint: str) -> str:
        """Add an initializer (kept in its dtype) and return its name.

        A floating-point array of at least ``SHARE_MIN`` elements that is byte-for-byte equal to
        one already added (a module called twice, a weight tied to another) reuses that
        initializer: the file holds each weight once, and counts of parameters stay true.
        """
        # np.ascontiguousarray would turn a 0-d array into shape [1]; keep scalars scalar.
        data = np.array(array, copy=True, order="C")
        key = None
        if data.dtype.kind == "f" and data.size >= SHARE_MIN:
            key = (data.dtype.str, data.shape, data.tobytes())
            if key in self._by_content:
                return self._by_content[key]
        name = self.fresh(hint)
        self._inits[name] = numpy_helper.from_array(data, name)
        if key is not None:
            self._by_content[key] = name
        return name

    def constant_value(self, name: str) -> np.ndarray[Any, Any] | None:
        """The array of initializer ``name``, or None when ``name`` is computed by the graph."""
        init = self._inits.get(name)
        return None if init is None else numpy_helper.to_array(init)

    def ints(self, values: Sequence[int], hint: str = "shape") -> str:
        """An int64 1-D constant (shapes, axes, indices)."""
        return self.const(np.asarray(values, dtype=np.int64), hint)

    def scalar(self, value: float, hint: str = "scalar", dtype: type = np.float32) -> str:
        """A 0-d constant of ``dtype``."""
        return self.const(np.asarray(value, dtype=dtype), hint)

    def node(
        self,
        op_type: str,
        inputs: Sequence[str],
        outputs: Sequence[str] | int = 1,
        **attrs: Any,
    ) -> list[str]:
        """Append a node; ``outputs`` is a count (fresh names) or explicit names ("" = unused).

        Trailing unused outputs are dropped, as the ONNX spec allows.
        """
        if isinstance(outputs, int):
            outs = [self.fresh(op_type if outputs == 1 else f"{op_type}_{i}") for i in range(outputs)]
        else:
            outs = list(outputs)
        written = list(outs)
        while written and written[-1] == "":
            written.pop()
        ins = list(inputs)
        while ins and ins[-1] == "":
            ins.pop()
        node_name = self.fresh(f"{op_type}") if self._scope else self.fresh(f"node/{op_type}")
        doc = (
            f"{self._scope.framework} layer '{self._scope.name}' ({self._scope.kind})"
            if self._scope
            else "seqgate glue"
        )
        n = helper.make_node(op_type, ins, written, name=node_name, doc_string=doc, **attrs)
        self._nodes.append(n)
        for o in written:
            if o:
                self._producer[o] = len(self._nodes) - 1
        if self._scope:
            self._scope.nodes.append(node_name)
        return outs

    def op(self, op_type: str, inputs: Sequence[str], **attrs: Any) -> str:
        """Single-output :meth:`node`."""
        return self.node(op_type, inputs, 1, **attrs)[0]

    @property
    def last_node_name(self) -> str:
        return self._nodes[-1].name

    # ----- opset-aware helpers -----------------------------------------------------------
    def transpose(self, x: str, perm: Sequence[int]) -> str:
        return self.op("Transpose", [x], perm=list(perm))

    def reshape(self, x: str, shape: Sequence[int]) -> str:
        """Reshape; 0 copies the input dim, -1 is inferred (allowzero=0)."""
        return self.op("Reshape", [x, self.ints(shape)])

    def squeeze(self, x: str, axes: Sequence[int]) -> str:
        return self.op("Squeeze", [x, self.ints(axes, "axes")])

    def unsqueeze(self, x: str, axes: Sequence[int]) -> str:
        return self.op("Unsqueeze", [x, self.ints(axes, "axes")])

    def slice(
        self,
        x: str,
        starts: Sequence[int],
        ends: Sequence[int],
        axes: Sequence[int],
        steps: Sequence[int] | None = None,
    ) -> str:
        ins = [x, self.ints(starts, "starts"), self.ints(ends, "ends"), self.ints(axes, "axes")]
        if steps is not None:
            ins.append(self.ints(steps, "steps"))
        return self.op("Slice", ins)

    def reverse_time(self, x: str, axis: int) -> str:
        """Flip ``x`` along ``axis`` (Slice with step -1, valid for any dynamic length)."""
        int64_min = int(np.iinfo(np.int64).min)
        return self.slice(x, [-1], [int64_min], [axis], [-1])

    def reduce(self, op_type: str, x: str, axes: Sequence[int], keepdims: bool) -> str:
        """ReduceSum/Mean/Max/Prod over ``axes``; axes became an input at opset 18 (13 for Sum)."""
        as_input = self.opset >= (13 if op_type == "ReduceSum" else 18)
        if as_input:
            return self.op(op_type, [x, self.ints(axes, "axes")], keepdims=int(keepdims))
        return self.op(op_type, [x], axes=list(axes), keepdims=int(keepdims))

    # ----- probes and outputs ------------------------------------------------------------
    def probe(self, probe: Probe) -> None:
        """Record an internal tensor the verifier should compare."""
        self._probes.append(probe)

    def output(self, value: str, name: str, elem_type: int, dims: Sequence[DimSpec]) -> None:
        """Declare graph output ``name`` holding ``value``."""
        self._outputs.append((value, name, elem_type, list(dims)))

    @property
    def layers(self) -> list[LayerRecord]:
        return list(self._layers)

    def _bind_outputs(self) -> list[onnx.ValueInfoProto]:
        graph_inputs = {vi.name for vi in self._inputs}
        claimed: set[str] = set()
        rename: dict[str, str] = {}
        infos: list[onnx.ValueInfoProto] = []
        for value, name, elem_type, dims in self._outputs:
            value = rename.get(value, value)
            producer = self._producer.get(value)
            free = name not in self._names or name == value
            if value == name:
                pass
            elif producer is not None and value not in claimed and free and value not in graph_inputs:
                rename[value] = name
                self._names.add(name)
                value = name
            else:
                if not free:
                    raise ValueError(f"graph output name {name!r} clashes with an internal name")
                self._names.add(name)
                n = helper.make_node(
                    "Identity", [value], [name], name=self.fresh(f"output/{name}"),
                    doc_string="seqgate glue: names a graph output",
                )
                self._nodes.append(n)
            claimed.add(value)
            infos.append(make_value_info(name, elem_type, dims))
        if rename:
            self._apply_rename(rename)
        return infos

    def _apply_rename(self, rename: dict[str, str]) -> None:
        for n in self._nodes:
            for i, v in enumerate(n.input):
                if v in rename:
                    n.input[i] = rename[v]
            for i, v in enumerate(n.output):
                if v in rename:
                    n.output[i] = rename[v]
        self._probes = [p.renamed(rename) for p in self._probes]

    # ----- final model -------------------------------------------------------------------
    def build(self, metadata: dict[str, str], check: bool = True) -> onnx.ModelProto:
        """Assemble, check and shape-infer the model. ``metadata`` goes to metadata_props."""
        outputs = self._bind_outputs()
        read = names_read(self._nodes) | {o.name for o in outputs}
        inits = [self._inits[k] for k in sorted(self._inits) if k in read]  # unread constants dropped
        graph = helper.make_graph(self._nodes, self.graph_name, self._inputs, outputs, inits)
        model = helper.make_model(
            graph,
            opset_imports=[helper.make_opsetid("", self.opset)],
            producer_name="seqgate",
            producer_version=metadata.get("seqgate.version", ""),
        )
        # ir_version: the one onnx writes for this opset, not the newest, so older runtimes load it.
        model.ir_version = _ir_version_for(self.opset)
        meta = dict(metadata)
        meta[PROBE_MAP_KEY] = json.dumps([p.to_json() for p in self._probes], sort_keys=True)
        meta["seqgate.layers"] = json.dumps(
            [{"name": r.name, "kind": r.kind, "nodes": list(r.nodes)} for r in self._layers],
            sort_keys=True,
        )
        helper.set_model_props(model, {k: meta[k] for k in sorted(meta)})
        if check:
            onnx.checker.check_model(model, full_check=True)
            onnx.shape_inference.infer_shapes(model, check_type=True, strict_mode=True)
        return model


def names_read(nodes: list[onnx.NodeProto]) -> set[str]:
    """Every value name a node reads, in sub-graphs too (a ``Scan`` body reads outer values by name)."""
    out: set[str] = set()
    for n in nodes:
        out.update(i for i in n.input if i)
        for a in n.attribute:
            for g in ([a.g] if a.type == onnx.AttributeProto.GRAPH else list(a.graphs)):
                out |= names_read(list(g.node)) | {o.name for o in g.output}
    return out


def _ir_version_for(opset: int) -> int:
    for entry in helper.VERSION_TABLE:
        # entries: (release, ir_version, ai.onnx opset, ai.onnx.ml opset[, training])
        if entry[2] == opset:
            return int(entry[1])
    return int(onnx.IR_VERSION)


FLOAT = TensorProto.FLOAT
INT64 = TensorProto.INT64
INT32 = TensorProto.INT32
