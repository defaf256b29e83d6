"""Make one reduced-precision variant of an exported model with ``onnxruntime.quantization``.

Kinds (``seqgate.settings.variants.VARIANT_KINDS``):

- ``int8_dynamic``: ``quantize_dynamic`` with INT8 weights (subgraphs included). ONNX Runtime
  turns LSTM into ``DynamicQuantizeLSTM`` and MatMul into ``MatMulInteger`` with activations
  quantized per call; GRU and RNN nodes stay float (FACTS.md).
- ``int8_dynamic_scan``: the same after every GRU/RNN node is rewritten in its exact scan form
  (``seqgate.variants.scanform``), so their weight products are MatMuls and get quantized.
  Made only when the model has a GRU/RNN node the rewrite takes.
- ``int8_static``: ``quantize_static`` in QDQ form, activation ranges calibrated (min/max) on the
  user's recorded windows, restricted to MatMul, Gemm and Conv (ONNX Runtime's static
  quantization has no recurrent op). Made only when such a node exists and recordings are given.
- ``float16``: ``onnxruntime.transformers.float16`` with float32 inputs and outputs kept.

Every variant keeps the seqgate metadata, the probe map included: where the quantizer renamed a
node (``rnn/LSTM`` → ``rnn/LSTM_quant``) the probe is pointed at the new node, so
``seqgate.verify`` runs the variant directly and compares its hidden states.

:func:`node_precision` says, for every weight-bearing node (MatMul, Gemm, Conv, LSTM, GRU, RNN
and their quantized forms, inside Scan bodies too), whether it runs in int8, float16 or float32.
"""

from __future__ import annotations

import json
import logging
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from seqgate.onnxfile.probes import PROBE_MAP_KEY, read_probe_map
from seqgate.verify.recordings import InputSpec, Recording, to_model_layout

INT8_OPS = ("DynamicQuantizeLSTM", "MatMulInteger", "ConvInteger", "DynamicQuantizeMatMul", "QLinearMatMul",
            "QLinearConv", "MatMulIntegerToFloat", "QGemm")
FLOAT_OPS = ("MatMul", "Gemm", "Conv", "LSTM", "GRU", "RNN")
STATIC_OPS = ("MatMul", "Gemm", "Conv")
CALIBRATION_WINDOWS = 512  # common practice: a few hundred samples settle min/max ranges


@dataclass
class Variant:
    """One made (or not made) variant: the model, what happened to each node, and why not."""

    kind: str
    model: Any | None
    nodes: list[dict[str, str]] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def made(self) -> bool:
        return self.model is not None


def make_variant(model: Any, kind: str, recordings: list[Recording] | None = None,
                 specs: list[InputSpec] | None = None) -> Variant:
    """Make ``kind`` of ``model`` (module docstring); a kind that does not apply gives ``model=None``."""
    notes: list[str] = []
    if kind == "float16":
        out = _float16(model)
    elif kind == "int8_static":
        out = _static(model, recordings or [], specs or [], notes)
    else:
        base = model
        if kind == "int8_dynamic_scan":
            from seqgate.variants.scanform import scan_form

            base, done, notes = scan_form(model)
            if not done:
                notes.append("no GRU/RNN node to rewrite: int8_dynamic_scan would equal int8_dynamic")
                return Variant(kind, None, notes=notes)
            notes.insert(0, f"{len(done)} GRU/RNN node(s) in exact scan form: {', '.join(done)}")
        out = _dynamic(base)
    if out is None:
        return Variant(kind, None, notes=notes)
    _repoint_renamed(model, out)
    return Variant(kind, out, node_precision(out, kind), notes)


def _quiet() -> Any:
    """onnxruntime.quantization logs advice at WARNING on the root logger; keep the CLI clean."""
    logger = logging.getLogger()
    level = logger.level
    logger.setLevel(logging.ERROR)
    return level


def _dynamic(model: Any) -> Any:
    import onnx
    from onnxruntime.quantization import QuantType, quantize_dynamic

    level = _quiet()
    try:
        with tempfile.TemporaryDirectory(prefix="seqgate-variant-") as tmp:
            out = Path(tmp) / "variant.onnx"
            # a ModelProto handed to the quantizer is changed in place (weights moved out): give a file
            quantize_dynamic(_saved(model, tmp), out, weight_type=QuantType.QInt8,
                             extra_options={"EnableSubgraph": True})
            return onnx.load(out)
    finally:
        logging.getLogger().setLevel(level)


def _saved(model: Any, tmp: str) -> Path:
    path = Path(tmp) / "float32.onnx"
    path.write_bytes(model.SerializeToString())
    return path


def _float16(model: Any) -> Any:
    """Half precision inside, float32 at the graph's inputs and outputs and at every probe."""
    import copy

    from onnxruntime.transformers.float16 import convert_float_to_float16

    out = convert_float_to_float16(copy.deepcopy(model), keep_io_types=True, disable_shape_infer=True)
    _probe_casts(out)
    return out


def _probe_casts(model: Any) -> None:
    """Each probe value cast back to float32 by a node of its own (probe outputs are float32)."""
    import dataclasses

    from onnx import TensorProto, helper

    probes = read_probe_map(model)
    nodes = {n.name: n for n in model.graph.node}
    fixed, casts = [], {}
    for p in probes:
        n = nodes[p.node]
        while len(n.output) <= p.output_index:
            n.output.append("")
        n.output[p.output_index] = p.value
        if p.value not in casts:  # the directions of one node share its value
            casts[p.value] = helper.make_node("Cast", [p.value], [f"{p.value}/float32"],
                                              name=f"{p.value}/float32", to=TensorProto.FLOAT)
            model.graph.node.append(casts[p.value])
        cast = casts[p.value]
        fixed.append(dataclasses.replace(p, node=cast.name, output_index=0, value=cast.output[0]))
    if fixed:
        entry = next(e for e in model.metadata_props if e.key == PROBE_MAP_KEY)
        entry.value = json.dumps([p.to_json() for p in fixed])


class _Windows:
    """``CalibrationDataReader`` over recorded windows: up to ``CALIBRATION_WINDOWS``, batch by batch."""

    def __init__(self, recordings: list[Recording], specs: list[InputSpec], batch: int = 32) -> None:
        self._it = self._feeds(recordings, specs, batch)

    @staticmethod
    def _feeds(recordings: list[Recording], specs: list[InputSpec], batch: int) -> Iterator[dict[str, Any]]:
        left = CALIBRATION_WINDOWS
        for rec in recordings:
            for _, feeds in rec.batches(batch):
                if left <= 0:
                    return
                n = min(left, next(iter(feeds.values())).shape[0])
                left -= n
                yield to_model_layout({k: v[:n] for k, v in feeds.items()}, specs)

    def get_next(self) -> dict[str, Any] | None:
        return next(self._it, None)


def _static(model: Any, recordings: list[Recording], specs: list[InputSpec], notes: list[str]) -> Any:
    import onnx
    from onnxruntime.quantization import CalibrationDataReader, QuantFormat, QuantType, quantize_static

    present = sorted({n.op_type for n in model.graph.node} & set(STATIC_OPS))
    if not present:
        notes.append("no MatMul, Gemm or Conv node: ONNX Runtime's static quantization has nothing to quantize "
                     "(it has no recurrent op)")
        return None
    recorded = [r for r in recordings if r.kind == "recorded"]
    if not recorded:
        notes.append("static INT8 is calibrated on recorded windows; the gate has none ([verify] recordings)")
        return None
    reader = type("WindowReader", (_Windows, CalibrationDataReader), {})(recorded, specs)
    level = _quiet()
    try:
        with tempfile.TemporaryDirectory(prefix="seqgate-variant-") as tmp:
            out = Path(tmp) / "variant.onnx"
            quantize_static(_saved(model, tmp), out, reader, quant_format=QuantFormat.QDQ,
                            op_types_to_quantize=present, activation_type=QuantType.QUInt8,
                            weight_type=QuantType.QInt8)
            notes.append(f"calibrated on up to {CALIBRATION_WINDOWS} recorded windows (min/max)")
            return onnx.load(out)
    finally:
        logging.getLogger().setLevel(level)


def _repoint_renamed(original: Any, variant: Any) -> None:
    """Point probes at the node that replaced theirs (same outputs, or the quantizer's ``_quant`` name)."""
    import dataclasses

    probes = read_probe_map(variant)
    names = {n.name for n in variant.graph.node}
    if not probes or all(p.node in names for p in probes):
        return
    by_output = {o: n.name for n in variant.graph.node for o in n.output if o}
    old = {n.name: n for n in original.graph.node}
    fixed = []
    for p in probes:
        new = p.node
        if p.node not in names:
            outs = [o for o in old[p.node].output if o] if p.node in old else []
            new = next((by_output[o] for o in outs if o in by_output), f"{p.node}_quant")
        fixed.append(dataclasses.replace(p, node=new))
    entry = next(e for e in variant.metadata_props if e.key == PROBE_MAP_KEY)
    entry.value = json.dumps([p.to_json() for p in fixed])


def _walk(graph: Any, prefix: str = "") -> Iterator[tuple[str, Any, Any]]:
    for n in graph.node:
        yield prefix + n.name, n, graph
        for a in n.attribute:
            if a.g is not None and a.g.node:
                yield from _walk(a.g, f"{prefix}{n.name}/")


def node_precision(model: Any, kind: str) -> list[dict[str, str]]:
    """Every weight-bearing node with its precision: ``int8``, ``float16`` or ``float32`` (module docstring)."""
    out = []
    for name, n, graph in _walk(model.graph):
        if n.op_type not in INT8_OPS and n.op_type not in FLOAT_OPS:
            continue
        dq = {o for m in graph.node if m.op_type == "DequantizeLinear" for o in m.output}
        if n.op_type in INT8_OPS or any(i in dq for i in n.input):
            precision = "int8"
        else:
            precision = "float16" if kind == "float16" else "float32"
        out.append({"node": name, "op": n.op_type, "precision": precision})
    return out
