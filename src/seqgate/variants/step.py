"""The gate's variant step: make, verify, time, keep the accepted files, mark the fastest.

Contract (``seqgate gate`` with ``[[variants]]`` entries):

1. :func:`make_and_verify` (after the float32 verify): each listed kind is made from the gate's
   ``model.onnx`` (``seqgate.variants.make``), written as ``model.<kind>.onnx`` beside it and
   verified against the source under its own rule (``seqgate.variants.check``). A kind that
   does not apply to the model (nothing to quantize, no recording to calibrate on) or that the
   quantizer fails on is reported as not made.
2. The profile sweep times every made variant at every point beside float32 and the source
   (``seqgate.profile.run``, runtime ``onnxruntime:<kind>``).
3. :func:`conclude`: latency figures per variant (speed-up over float32 ONNX Runtime and over
   the source framework, per point and as a geometric mean over the points), file size; a
   variant is **accepted** when it was made and every check of its rule passed. Rejected files
   are deleted; accepted ones stay in the gate's output folder. The accepted variant with the
   largest mean speed-up over float32 is marked ``chosen``, if that speed-up is above 1 (a
   variant slower than the float32 file is no reason to ship it; none without a profile).
4. The gate's ``variants`` check fails only when a variant whose rule says ``required = true``
   is not accepted: otherwise a rejected variant is simply not shipped, and the check passes.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

from seqgate.settings import VariantRule
from seqgate.util.progress import SILENT, Progress


def make_and_verify(rules: tuple[VariantRule, ...], model_path: Path, options: dict[str, Any],
                    progress: Progress = SILENT) -> tuple[list[dict[str, Any]], dict[str, Any]]:
    """Entries per rule (module docstring, step 1) and {kind: ModelProto} of the made ones."""
    from seqgate.onnxfile.load import load_onnx
    from seqgate.util.files import write_atomic
    from seqgate.verify.recordings import input_specs, load_recording

    model = load_onnx(model_path)
    specs = input_specs(model)
    recs = [load_recording(p, specs) for p in options.get("recordings", [])]
    entries, models = [], {}
    for rule in rules:
        progress.start(f"making variant {rule.kind}")
        variant = _make(model, rule.kind, recs, specs)
        progress.finish()
        entry: dict[str, Any] = {"kind": rule.kind, "rule": rule.to_json(), "made": variant.made,
                                 "notes": variant.notes, "nodes": variant.nodes, "file": None,
                                 "float32_size_bytes": model_path.stat().st_size}
        if variant.made:
            path = model_path.parent / rule.file_name
            write_atomic(path, variant.model.SerializeToString())
            entry.update(file=str(path), size_bytes=path.stat().st_size)
            entry.update(verify_variant_file(path, rule, options, progress))
            models[rule.kind] = variant.model
        else:
            entry.update(passed=False, checks=[{"name": "made", "passed": False,
                                                "detail": "; ".join(variant.notes) or "not made"}])
        entries.append(entry)
    return entries, models


def _make(model: Any, kind: str, recs: list[Any], specs: list[Any]) -> Any:
    from seqgate.errors import SeqgateError
    from seqgate.util.text import first_line
    from seqgate.variants.make import Variant, make_variant

    try:
        return make_variant(model, kind, recs, specs)
    except SeqgateError:
        raise
    except Exception as e:  # the quantizer's own failures: this kind is not made, the gate goes on
        return Variant(kind, None, notes=[f"onnxruntime could not make it: {type(e).__name__}: "
                                          f"{first_line(e)}"])


def verify_variant_file(path: Path, rule: VariantRule, options: dict[str, Any],
                        progress: Progress) -> dict[str, Any]:
    from seqgate.variants.check import verify_variant

    return verify_variant(path, rule, {**options, "progress": progress})


def _geomean(xs: list[float]) -> float | None:
    xs = [x for x in xs if x and x > 0 and math.isfinite(x)]
    return math.exp(sum(math.log(x) for x in xs) / len(xs)) if xs else None


def latency(kind: str, profile: dict[str, Any] | None) -> list[dict[str, Any]]:
    """Per measured point: the variant's p50 and its speed-up over float32 and over the source."""
    if not profile:
        return []
    pts = profile["points"]
    label = f"onnxruntime:{kind}"
    key = ("seq_len", "batch", "threads")
    source = {tuple(p[k] for k in key): p for p in pts if not p["runtime"].startswith("onnxruntime")}
    base = {tuple(p[k] for k in key): p for p in pts if p["runtime"] == "onnxruntime"}
    out = []
    for p in (p for p in pts if p["runtime"] == label):
        k = tuple(p[x] for x in key)
        src = source.get(k)
        out.append({"seq_len": p["seq_len"], "batch": p["batch"], "threads": p["threads"],
                    "p50_ms": p["p50_ms"], "p99_ms": p["p99_ms"],
                    "float32_p50_ms": base[k]["p50_ms"] if k in base else None,
                    "speedup_vs_float32": p["speedup"],
                    "speedup_vs_source": src["p50_ms"] / p["p50_ms"] if src and p["p50_ms"] > 0 else None})
    return out


def conclude(entries: list[dict[str, Any]], profile: dict[str, Any] | None) -> dict[str, Any]:
    """Steps 3 and 4 of the module docstring; returns the gate check (entries are updated)."""
    for e in entries:
        e["latency"] = latency(e["kind"], profile) if e["made"] else []
        e["speedup"] = _geomean([p["speedup_vs_float32"] for p in e["latency"]])
        e["speedup_vs_source"] = _geomean([p["speedup_vs_source"] for p in e["latency"]])
        e["accepted"] = bool(e["made"] and e.get("passed"))
        e["chosen"] = False
        if e["file"] and not e["accepted"]:
            Path(e["file"]).unlink(missing_ok=True)
            e["file"] = None
    timed = [e for e in entries if e["accepted"] and e["speedup"] is not None and e["speedup"] > 1.0]
    if timed:
        max(timed, key=lambda e: e["speedup"])["chosen"] = True
    missing = [e["kind"] for e in entries if e["rule"]["required"] and not e["accepted"]]
    head = f"required variant(s) rejected: {', '.join(missing)}; " if missing else ""
    return {"name": "variants", "passed": not missing, "detail": head + "; ".join(_summary(e) for e in entries)}


def _summary(e: dict[str, Any]) -> str:
    if not e["made"]:
        return f"{e['kind']} not made"
    if not e["accepted"]:
        failed = ", ".join(c["name"] for c in e["checks"] if not c["passed"])
        return f"{e['kind']} rejected ({failed})"
    speed = f", {e['speedup']:.2f}× float32" if e["speedup"] else ""
    return f"{e['kind']} accepted{speed}{' (chosen)' if e['chosen'] else ''}"
