"""``--oracle``: re-run the worst windows under ``onnx.reference`` as a third opinion.

The reference evaluator is a plain reading of the ONNX spec, independent of onnxruntime's
kernels. For each kept worst window (per set), every compared tensor is computed three ways
and classified:

- ``runtime kernel differs`` — reference ≈ source but onnxruntime differs;
- ``graph differs``          — reference ≈ onnxruntime but both differ from the source;
- ``all differ``             — no two agree; ``agree`` — all within tolerance.

Refusal rather than a wrong opinion (FACTS.md): the evaluator silently ignores
``sequence_lens``, ``clip``, ``input_forget`` and non-default activations for LSTM/GRU, and its
RNN knows only Tanh/Affine. When the model uses any of these, the oracle is not run and the
report says which node and attribute stopped it.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from seqgate.onnxfile.probes import Probe, to_canonical, with_probe_outputs
from seqgate.settings import Tolerances
from seqgate.util.text import first_line
from seqgate.verify.compare import within_tolerance

_DEFAULT_ACTS = {"LSTM": ["Sigmoid", "Tanh", "Tanh"], "GRU": ["Sigmoid", "Tanh"]}
_RNN_ACTS = ("Tanh", "Affine")


def oracle_blockers(model: Any) -> list[str]:
    """Every node attribute the reference evaluator would silently ignore (empty: usable)."""
    from onnx import helper

    out = []
    for n in model.graph.node:
        if n.op_type not in ("LSTM", "GRU", "RNN"):
            continue
        attrs = {a.name: helper.get_attribute_value(a) for a in n.attribute}
        if len(n.input) > 4 and n.input[4]:
            out.append(f"{n.name}: sequence_lens is used")
        if "clip" in attrs:
            out.append(f"{n.name}: clip={attrs['clip']}")
        if attrs.get("input_forget", 0):
            out.append(f"{n.name}: input_forget=1")
        acts = [a.decode() if isinstance(a, bytes) else a for a in attrs.get("activations", [])]
        if n.op_type in _DEFAULT_ACTS:
            dirs = 2 if attrs.get("direction", b"forward") in (b"bidirectional", "bidirectional") else 1
            if acts and acts != _DEFAULT_ACTS[n.op_type] * dirs:
                out.append(f"{n.name}: activations {acts}")
        elif any(a not in _RNN_ACTS for a in acts):
            out.append(f"{n.name}: activations {acts}")
    return out


def _classify(ort_ok: bool, ref_src_ok: bool, ref_ort_ok: bool) -> str:
    if ort_ok and ref_src_ok:
        return "agree"
    if ref_src_ok:
        return "runtime kernel differs"
    if ref_ort_ok:
        return "graph differs"
    return "all differ"


def run_oracle(model: Any, probes: list[Probe], infos: list[Any], results: list[Any], onnx_runner: Any,
               src_runner: Any, tol: Tolerances) -> dict[str, Any]:
    """The oracle section of the report (see module docstring)."""
    blockers = oracle_blockers(model)
    if blockers:
        return {"ran": False, "reason": "onnx.reference silently ignores attributes this model uses: "
                + "; ".join(blockers)}
    from onnx.reference import ReferenceEvaluator

    full = with_probe_outputs(model, probes) if probes else model
    try:
        ev = ReferenceEvaluator(full)
    except Exception as e:  # the evaluator raises many types for ops it lacks
        return {"ran": False, "reason": f"onnx.reference cannot load the model: {first_line(e)}"}
    outputs = [o.name for o in model.graph.output]
    fetch = list(dict.fromkeys([*outputs, *(p.value for p in probes)]))
    windows = []
    for r in results:
        for score, neg_index, feeds in sorted(r.worst, reverse=True):
            try:
                vals = dict(zip(fetch, ev.run(fetch, feeds), strict=True))
            except Exception as e:
                return {"ran": False, "reason": f"onnx.reference failed: {first_line(e)}"}
            ref = {n: np.asarray(vals[n]) for n in outputs}
            ref.update({p.name: to_canonical(p, np.asarray(vals[p.value])) for p in probes})
            windows.append(_judge(r.recording.label, -neg_index, score, infos, ref, onnx_runner.run(feeds),
                                  src_runner.run(feeds), tol))
    return {"ran": True, "windows": windows}


def _judge(label: str, index: int, score: float, infos: list[Any], ref: dict[str, Any], ort: dict[str, Any],
           src: dict[str, Any], tol: Tolerances) -> dict[str, Any]:
    tensors = []
    for t in infos:
        a, r = tol.for_tensor(t.name)
        o, s, e = ort[t.name], src[t.name], ref[t.name]
        verdict = _classify(bool(within_tolerance(o, s, a, r).all()), bool(within_tolerance(e, s, a, r).all()),
                            bool(within_tolerance(o, e, a, r).all()))
        tensors.append({"name": t.name, "verdict": verdict,
                        "max_abs_onnxruntime_vs_source": float(np.max(np.abs(o - s), initial=0.0)),
                        "max_abs_reference_vs_source": float(np.max(np.abs(e - s), initial=0.0)),
                        "max_abs_onnxruntime_vs_reference": float(np.max(np.abs(o - e), initial=0.0))})
    return {"recording": label, "window": index, "score": score, "tensors": tensors}
