"""What ``seqgate profile`` found: points, latency lines, budget verdicts, the JSON report.

Per point (seq len × batch × threads × runtime), from the timed runs:

- ``p50_ms`` … ``std_ms``, ``runs``: see ``seqgate.profile_stats``;
- ``sequences_per_s = batch / p50``, ``steps_per_s = batch · T / p50``, ``us_per_step = p50 / T``
  (all from the median, the figure least moved by a stray slow run);
- ``gflops = 2 · macs(T) · batch / p50 / 1e9``: achieved GFLOP/s, one MAC being two FLOPs, with
  ``macs(T)`` from the cost model (``seqgate.costs``) at batch 1 (every counted op is linear in
  the batch);
- ``speedup`` (ONNX Runtime points, and the source point beside it): source p50 / ONNX Runtime
  p50 at the same T, batch and threads — how many times faster the export runs.

Padded points (``lengths`` not ``"full"``, ``padded`` true; ``seqgate profile --lengths``) are
measured beside the full-length ones with the same T, batch and threads; ``valid_steps`` counts
the valid steps of the batch (``batch · T`` for a full one) and ``macs_per_sequence`` is the
cost model at the batch's mean valid length. They get their own lines and speed-ups but never a
budget verdict: budgets judge full-length batches, every row T steps, the longest work a batch
of that length can carry.

Budgets are judged on ONNX Runtime, the runtime that ships: a budget holds when, at its length,
the chosen percentile **measured** there is ≤ its milliseconds at **every** batch and thread count
(``basis: "measured"``). A budget with no measured point at its length fails (``basis: "not
measured"``); a fitted line never decides a verdict.

Fits (``seqgate.profile.stats``): one line per (runtime, batch, threads) with at least three
distinct lengths; a group with fewer gets none, and a note says "too few lengths to fit". Each
fit carries ``quality`` (``"good"``/``"poor"``) and ``poor_reasons``, the measured range, and per
budget the longest length predicted within it, with ``extrapolated`` true when that length lies
outside the measured range. Beside each prediction, ``longest_measured_seq_len`` is the longest
*measured* length whose percentile met the budget (``None`` when none did).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import Any

from seqgate.profile.stats import MIN_FIT_LENGTHS, TOO_FEW_LENGTHS, LineFit, Stats, fit_line, longest_within
from seqgate.settings import Budget

SCHEMA = "seqgate.profile/1"
ONNXRUNTIME = "onnxruntime"


@dataclass
class Point:
    """One measured point."""

    seq_len: int
    batch: int
    threads: int
    runtime: str
    stats: Stats
    macs_per_sequence: int
    framework_threads: int | None = None
    speedup: float | None = None
    lengths: str = "full"  # "full", or how the rows of a padded batch got their lengths
    valid_steps: int | None = None  # valid steps in the whole batch (padded points)

    @property
    def padded(self) -> bool:
        return self.lengths != "full"

    def key(self) -> tuple[int, int, int, str]:
        return (self.seq_len, self.batch, self.threads, self.lengths)

    def to_dict(self) -> dict[str, Any]:
        s = self.stats
        p50_s = s.p50_ms / 1e3
        return {
            "seq_len": self.seq_len, "batch": self.batch, "threads": self.threads,
            "runtime": self.runtime,
            "p50_ms": s.p50_ms, "p90_ms": s.p90_ms, "p99_ms": s.p99_ms, "min_ms": s.min_ms,
            "max_ms": s.max_ms, "mean_ms": s.mean_ms, "std_ms": s.std_ms, "runs": s.runs,
            "sequences_per_s": self.batch / p50_s if p50_s > 0 else None,
            "steps_per_s": self.batch * self.seq_len / p50_s if p50_s > 0 else None,
            "us_per_step": s.p50_ms * 1e3 / self.seq_len,
            "macs_per_sequence": self.macs_per_sequence,
            "gflops": 2 * self.macs_per_sequence * self.batch / p50_s / 1e9 if p50_s > 0 else None,
            "speedup": self.speedup,
            "framework_threads": self.framework_threads,
            "lengths": self.lengths, "padded": self.padded,
            "valid_steps": self.batch * self.seq_len if self.valid_steps is None else self.valid_steps,
        }


def attach_speedups(points: list[Point]) -> None:
    """Set ``speedup`` on each ONNX Runtime point that has a source point beside it, and on that one."""
    ort = {p.key(): p for p in points if p.runtime == ONNXRUNTIME}
    for p in points:
        base = ort.get(p.key())
        if p.runtime != ONNXRUNTIME and base is not None and base.stats.p50_ms > 0:
            p.speedup = p.stats.p50_ms / base.stats.p50_ms
            base.speedup = p.speedup


def _longest_measured(pts: list[Point], percentile: int, budget_ms: float) -> int | None:
    ok = [p.seq_len for p in pts if p.stats.at(percentile) <= budget_ms]
    return max(ok) if ok else None


def _prediction(fit: LineFit, pts: list[Point], percentile: int, b: Budget) -> dict[str, Any]:
    longest = longest_within(fit, b.ms)
    return {"budget_ms": b.ms, "budget_seq_len": b.seq_len, "seq_len": longest,
            "extrapolated": fit.extrapolated(longest),
            "longest_measured_seq_len": _longest_measured(pts, percentile, b.ms)}


def fits_for(points: list[Point], percentile: int, budgets: list[Budget],
             notes: list[str] | None = None) -> list[dict[str, Any]]:
    """One least-squares line per (batch, threads, runtime), on the chosen percentile (module docstring)."""
    groups: dict[tuple[str, int, int, str], list[Point]] = {}
    for p in points:
        groups.setdefault((p.runtime, p.batch, p.threads, p.lengths), []).append(p)
    out: list[dict[str, Any]] = []
    for (runtime, batch, threads, lengths), pts in groups.items():
        fit = fit_line([p.seq_len for p in pts], [p.stats.at(percentile) for p in pts])
        if fit is None:
            if notes is not None:
                n = len({p.seq_len for p in pts})
                padded = "" if lengths == "full" else f" ({lengths} padded batches)"
                notes.append(f"no latency line for {runtime} batch {batch} threads {threads}{padded}: "
                             f"{TOO_FEW_LENGTHS} ({n} measured; a line needs at least {MIN_FIT_LENGTHS}).")
            continue
        reasons = fit.poor_reasons()
        out.append({
            "runtime": runtime, "batch": batch, "threads": threads, "lengths": lengths,
            "percentile": percentile,
            "a_ms": fit.a_ms, "b_ms_per_step": fit.b_ms_per_step, "r2": fit.r2, "points": fit.n,
            "a_stderr_ms": fit.a_stderr_ms, "measured_seq_lens": [int(fit.t_min), int(fit.t_max)],
            "quality": "poor" if reasons else "good", "poor_reasons": reasons,
            "longest_seq_len": [_prediction(fit, pts, percentile, b) for b in budgets],
        })
    return out


def budget_checks(points: list[Point], budgets: list[Budget], percentile: int,
                  fits: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """One verdict per budget and ONNX Runtime (batch, threads) setting, from the measured point only."""
    line = {(f["batch"], f["threads"]): f for f in fits
            if f["runtime"] == ONNXRUNTIME and f.get("lengths", "full") == "full"}
    points = [p for p in points if not p.padded]  # budgets judge full-length batches, the worst case
    out: list[dict[str, Any]] = []
    for b in budgets:
        found = [p for p in points if p.runtime == ONNXRUNTIME and p.seq_len == b.seq_len]
        for p in found:
            measured = p.stats.at(percentile)
            fit = line.get((p.batch, p.threads))
            preds = fit["longest_seq_len"] if fit else []
            pred = next((x for x in preds if x["budget_seq_len"] == b.seq_len), None)
            same = [q for q in points if q.runtime == ONNXRUNTIME and q.key()[1:] == p.key()[1:]]
            out.append({
                "seq_len": b.seq_len, "budget_ms": b.ms, "percentile": percentile,
                "batch": p.batch, "threads": p.threads, "runtime": ONNXRUNTIME, "basis": "measured",
                "measured_ms": measured, "margin_ms": b.ms - measured, "passed": measured <= b.ms,
                "predicted_longest_seq_len": pred["seq_len"] if pred else None,
                "predicted_extrapolated": pred["extrapolated"] if pred else None,
                "fit_quality": fit["quality"] if fit else None,
                "longest_measured_seq_len": _longest_measured(same, percentile, b.ms),
            })
        if not found:  # never judged from a line: no measurement, no pass
            out.append({"seq_len": b.seq_len, "budget_ms": b.ms, "percentile": percentile, "batch": None,
                        "threads": None, "runtime": ONNXRUNTIME, "basis": "not measured",
                        "measured_ms": math.inf, "margin_ms": -math.inf, "passed": False,
                        "predicted_longest_seq_len": None, "predicted_extrapolated": None, "fit_quality": None,
                        "longest_measured_seq_len": None})
    return out


@dataclass
class ProfileReport:
    """Everything one profile run measured and decided; ``to_json()`` is the report file."""

    model: dict[str, Any]
    source: dict[str, Any] | None
    options: dict[str, Any]
    seed: int
    points: list[Point]
    fits: list[dict[str, Any]]
    budgets: list[dict[str, Any]]
    environment: dict[str, Any]
    timer: dict[str, Any]
    notes: list[str] = field(default_factory=list)
    streaming: dict[str, Any] | None = None  # per-call latency of a streaming file (profile.streaming)

    @property
    def passed(self) -> bool:
        """True when every budget check holds (and trivially with no budget), per-call budgets included."""
        return all(b["passed"] for b in self.budgets) and (self.streaming is None or self.streaming["passed"])

    def to_dict(self) -> dict[str, Any]:
        from seqgate import __version__

        return {
            "schema": SCHEMA,
            "seqgate_version": __version__,
            "passed": self.passed,
            "seed": self.seed,
            "model": self.model,
            "source": self.source,
            "options": self.options,
            "points": [p.to_dict() for p in self.points],
            "fits": self.fits,
            "budgets": self.budgets,
            "environment": self.environment,
            "timer": self.timer,
            "notes": self.notes,
            "streaming": self.streaming,
        }

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2, sort_keys=True) + "\n"
