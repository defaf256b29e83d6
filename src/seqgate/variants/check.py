"""Verify a variant file against the source framework under its own acceptance rule.

The variant file keeps the probe map, so ``seqgate.verify.run.verify_model`` runs it directly,
on the same window sets as the float32 check, with the rule's tolerances (``atol``/``rtol``;
absent, the bound is infinite: differences are reported, only NaN/Inf fail). On top of verify's
per-tensor statistics (max |Δ| and the per-step drift curve of every hidden state) this adds the
task-level figures of the **recorded** windows (synthetic sets are stress, not the task):

- ``top1_agreement``: Σ agreeing windows / Σ windows over recorded sets, for class-score outputs
  (verify's own count: argmax, or ``score > 0.5`` for one unit); ``label_flips``: windows whose
  label differs from the source's (summed over class outputs and recorded sets);
- ``forecast``: for recordings holding a ``targets`` array, the mean absolute error of the
  source and of the variant against the targets on the output whose per-window size equals the
  targets', and ``relative_increase = (MAE_variant − MAE_source) / MAE_source``.

Dynamic INT8 picks each activation's scale per call (the min/max of that call's batch), so a
dynamic variant's outputs depend on which windows share a call: the figures hold for the verify
batch size (``[verify] batch_size``), and a deployment that calls with another batch differs
slightly.

Each criterion of the rule is one check ``{name, passed, detail}``; the variant is accepted when
every check passes. A task threshold the model cannot be judged on (no class-score output, no
targets) fails its check, naming why.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from seqgate.settings import Tolerances, VariantRule

TRIMMED_KEYS = ("passed", "headline", "first_divergence", "recordings", "warnings", "settings")


@dataclass
class ForecastError:
    """Streaming |prediction − target| sums of the source and the variant (recorded sets with targets)."""

    output: str | None = None
    count: int = 0
    source_abs: float = 0.0
    variant_abs: float = 0.0
    source_sq: float = 0.0
    variant_sq: float = 0.0
    notes: list[str] = field(default_factory=list)
    _targets: dict[str, Any] = field(default_factory=dict)

    def observe(self, rec: Any, start: int, onnx_out: dict[str, Any], src_out: dict[str, Any],
                outputs: list[str]) -> None:
        n = np.asarray(src_out[outputs[0]]).shape[0] if outputs else 0  # outputs batch-major (axis 0)
        y = self._batch(rec, start, n, outputs, onnx_out)
        if y is None or self.output is None:
            return
        a = np.asarray(onnx_out[self.output], np.float64).reshape(y.shape)
        s = np.asarray(src_out[self.output], np.float64).reshape(y.shape)
        self.count += y.size
        self.variant_abs += float(np.abs(a - y).sum())
        self.source_abs += float(np.abs(s - y).sum())
        self.variant_sq += float(((a - y) ** 2).sum())
        self.source_sq += float(((s - y) ** 2).sum())

    def _batch(self, rec: Any, start: int, n: int, outputs: list[str], out: dict[str, Any]) -> Any:
        from seqgate.verify.recordings import TARGETS_KEY, open_arrays

        if rec.kind != "recorded" or rec.path is None:
            return None
        key = str(rec.path)
        if key not in self._targets:
            self._targets[key] = open_arrays(Path(rec.path)).get(TARGETS_KEY)
        t = self._targets[key]
        if t is None:
            return None
        y = np.asarray(t.read(start, start + n), np.float64).reshape(n, -1)
        if self.output is None:
            fits = [o for o in outputs if np.asarray(out[o]).size == y.size]
            if not fits:
                self._targets[key] = None
                self.notes.append(f"{rec.label}: targets {list(t.shape)} fit no output's size; not judged")
                return None
            self.output = fits[0]
        return y

    def to_json(self) -> dict[str, Any] | None:
        if not self.count:
            return None
        mae_s, mae_v = self.source_abs / self.count, self.variant_abs / self.count
        rel = (mae_v - mae_s) / mae_s if mae_s > 0 else (0.0 if mae_v == 0 else math.inf)
        return {"output": self.output, "values": self.count, "source_mae": mae_s, "variant_mae": mae_v,
                "source_rmse": math.sqrt(self.source_sq / self.count),
                "variant_rmse": math.sqrt(self.variant_sq / self.count),
                "relative_increase": rel}


def rule_tolerances(rule: VariantRule) -> Tolerances:
    """The rule's atol/rtol; a pair not given is infinite atol / zero rtol (not judged)."""
    if rule.atol is None and rule.rtol is None:
        return Tolerances(math.inf, 0.0)
    return Tolerances(rule.atol if rule.atol is not None else 0.0, rule.rtol if rule.rtol is not None else 0.0)


def verify_variant(path: Path, rule: VariantRule, options: dict[str, Any]) -> dict[str, Any]:
    """Verify the variant file at ``path``; ``options`` are ``verify_model``'s keyword arguments
    (source, weights, recordings, synthetic, batch_size, states, task, seed, progress)."""
    from seqgate.onnxfile.load import load_onnx
    from seqgate.verify.run import verify_model

    outputs = [o.name for o in load_onnx(path).graph.output]
    forecast = ForecastError()
    vr = verify_model(path, tolerances=rule_tolerances(rule),
                      observe=lambda r, s, a, b: forecast.observe(r, s, a, b, outputs), **options)
    report = vr.to_json()
    figures = task_figures(report, forecast)
    checks = judge(rule, vr.passed, figures)
    trimmed = {k: report[k] for k in TRIMMED_KEYS}
    trimmed["tensors"] = [{k: t[k] for k in ("name", "kind", "layer", "direction", "atol", "rtol", "passed",
                                             "metrics", "per_step_max_abs")} for t in report["tensors"]]
    return {"verify": trimmed, "figures": figures, "checks": checks,
            "passed": all(c["passed"] for c in checks)}


def task_figures(report: dict[str, Any], forecast: ForecastError) -> dict[str, Any]:
    """max |Δ|, top-1 agreement and flips on recorded windows, forecast error, drift curves."""
    recorded = {r["label"] for r in report["recordings"] if r["kind"] == "recorded"}
    agree = total = flips = 0.0
    classed = False
    for t in report["tensors"]:
        for label, entry in t["by_recording"].items():
            m = entry["metrics"]
            if label in recorded and "top1_agreement" in m:
                classed = True
                agree += m["top1_agreement"] * m["windows"]
                total += m["windows"]
                flips += m["label_flips"]
    maxes = [t["metrics"]["max_abs"] for t in report["tensors"]]
    outs = [t["metrics"]["max_abs"] for t in report["tensors"] if t["kind"] == "output"]
    return {
        "max_abs": max((math.inf if m is None else m for m in maxes), default=0.0),
        "output_max_abs": max((math.inf if m is None else m for m in outs), default=0.0),
        "recorded_windows": sum(r["windows"] for r in report["recordings"] if r["kind"] == "recorded"),
        "top1_agreement": agree / total if classed and total else None,
        "label_flips": int(flips) if classed else None,
        "forecast": forecast.to_json(), "forecast_notes": forecast.notes,
        "drift": {t["name"]: t["per_step_max_abs"] for t in report["tensors"]
                  if t["kind"] == "hidden_sequence" and t["per_step_max_abs"] is not None},
    }


def judge(rule: VariantRule, within: bool, f: dict[str, Any]) -> list[dict[str, Any]]:
    """One check per criterion of ``rule`` (module docstring)."""
    checks = []
    if rule.atol is not None or rule.rtol is not None:
        checks.append({"name": "tolerance", "passed": within,
                       "detail": f"max |Δ| {f['max_abs']:.3g} (atol {rule.atol}, rtol {rule.rtol})"})
    else:
        checks.append({"name": "finite", "passed": within,
                       "detail": f"no tolerance in the rule; max |Δ| {f['max_abs']:.3g}"})
    top1, flips = f["top1_agreement"], f["label_flips"]
    none = "no class-score output on recorded windows (set [verify] task = \"classify\"?)"
    if rule.min_top1_agreement is not None:
        ok = top1 is not None and top1 >= rule.min_top1_agreement
        checks.append({"name": "top1_agreement", "passed": ok, "detail": none if top1 is None else
                       f"{top1:.4%} of {f['recorded_windows']} recorded windows (at least "
                       f"{rule.min_top1_agreement:.4%})"})
    if rule.max_label_flips is not None:
        ok = flips is not None and flips <= rule.max_label_flips
        checks.append({"name": "label_flips", "passed": ok, "detail": none if flips is None else
                       f"{flips} flipped (at most {rule.max_label_flips})"})
    if rule.max_forecast_error_increase is not None:
        fc = f["forecast"]
        ok = fc is not None and fc["relative_increase"] <= rule.max_forecast_error_increase
        detail = ("no recording with a targets array fits an output" if fc is None else
                  f"MAE {fc['variant_mae']:.4g} vs source {fc['source_mae']:.4g}: "
                  f"{fc['relative_increase']:+.3%} "
                  f"(at most +{rule.max_forecast_error_increase:.3%})")
        checks.append({"name": "forecast_error", "passed": ok, "detail": detail})
    return checks
