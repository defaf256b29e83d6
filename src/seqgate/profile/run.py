"""``seqgate profile``: CPU latency per sequence length, against budgets, beside the source framework.

Measurement hygiene (the contract of :func:`profile_model`):

- one onnxruntime session per thread setting: ``intra_op_num_threads`` as asked,
  ``inter_op_num_threads = 1``, ``ORT_SEQUENTIAL``, ``ORT_ENABLE_ALL`` (all recorded);
- every runtime is driven through ``seqgate.runtimes`` (the same runners verify uses): what is
  timed is each runner's ``timed_call``, whose outputs are flattened by the one rule of
  ``seqgate.util.outputs`` for the sanity comparison with ONNX Runtime;
- inputs generated once per point from a seeded generator (``seqgate.profile.inputs``), the
  same arrays for every thread count and runtime;
- ``warmup`` runs discarded, then timed runs until both ``min_runs`` runs and ``min_time``
  seconds are reached; each run is timed alone with ``time.perf_counter_ns`` while garbage
  collection is paused (re-enabled in ``finally``);
- the timer's own cost (two back-to-back ``perf_counter_ns`` calls) is measured and reported,
  not subtracted: the figures are raw wall times of the calls;
- a model that fixes its time dim is measured at that length only (noted); a budget at another
  length is then an error (exit 2);
- budget lengths missing from ``seq_lens`` are added to the sweep;
- ``lengths`` other than ``"full"`` (a model that takes lengths or a mask): at every point a
  padded batch is measured beside the full-length one, from the same arrays with each row's
  tail padded (``seqgate.profile.inputs``); such points are labelled ``padded`` and never judged
  by a budget;
- settings are parsed by ``seqgate.settings`` (defaults there too); a sweep whose inputs alone
  would not fit in memory is refused before anything is timed;
- ``variants`` (label → ONNX ModelProto with the same inputs, e.g. INT8 variants): each is timed
  at every point right after the float32 file, on the same inputs, as runtime
  ``onnxruntime:<label>``; its ``speedup`` is float32 p50 / variant p50 (how many times faster
  than the float32 file). Budgets are still judged on the float32 file only.
"""

from __future__ import annotations

import gc
import math
import os
import time
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from seqgate.errors import BadInputError
from seqgate.export.streaming import is_streaming, ordinary_view
from seqgate.profile.inputs import (
    InputPlan,
    draw_lengths,
    make_inputs,
    model_axes,
    pad_batch,
    padded_model,
    plan_inputs,
)
from seqgate.profile.result import ONNXRUNTIME, Point, ProfileReport, attach_speedups, budget_checks, fits_for
from seqgate.profile.stats import summarize_ns
from seqgate.settings import PYTHON, Budget, Problems, check_input_memory, parse_seed, parse_settings
from seqgate.settings import defaults as d
from seqgate.util.progress import SILENT, Progress
from seqgate.util.text import first_line

# Loose on purpose: this only catches a --source that is not the exported model; `seqgate verify`
# is the real comparison.
_SANITY_ATOL = _SANITY_RTOL = 1e-3


def time_call(call: Callable[[], Any], warmup: int, min_runs: int, min_time: float) -> list[int]:
    """Run ``call`` ``warmup`` times untimed, then time runs (ns) until ``min_runs`` and ``min_time``."""
    for _ in range(warmup):
        call()
    gc.collect()
    was_enabled = gc.isenabled()
    gc.disable()
    clock = time.perf_counter_ns
    samples: list[int] = []
    try:
        deadline = clock() + int(min_time * 1e9)
        while True:
            t0 = clock()
            call()
            t1 = clock()
            samples.append(t1 - t0)
            if len(samples) >= min_runs and t1 >= deadline:
                break
    finally:
        if was_enabled:
            gc.enable()
    return samples


def timer_overhead(n: int = 20000) -> dict[str, Any]:
    """Cost of one timing (two back-to-back ``perf_counter_ns`` calls), median and minimum."""
    clock = time.perf_counter_ns
    deltas = []
    for _ in range(n):
        a = clock()
        b = clock()
        deltas.append(b - a)
    deltas.sort()
    return {
        "clock": "time.perf_counter_ns",
        "overhead_median_ns": deltas[n // 2],
        "overhead_min_ns": deltas[0],
        "resolution_ns": time.get_clock_info("perf_counter").resolution * 1e9,
        "subtracted": False,
    }


def _sweep_lengths(axes: Any, seq_lens: list[int], budgets: list[Budget], notes: list[str]) -> list[int]:
    if not axes.has_time:
        raise BadInputError("the model has no time axis (no input of rank ≥ 2), so there is no "
                            "sequence length to sweep; seqgate profile is for sequence models.")
    if axes.fixed_time is not None:
        t = axes.fixed_time
        wrong = [b for b in budgets if b.seq_len != t]
        if wrong:
            raise BadInputError(
                f"the model fixes its time dim at {t}, so it can only be measured at length {t}; "
                f"the budget at length {wrong[0].seq_len} cannot be checked. Budget T={t}, or "
                f"export the model with a free time dim.")
        notes.append(f"the model fixes its time dim at {t}: the sweep is limited to T={t}.")
        return [t]
    extra = sorted({b.seq_len for b in budgets} - set(seq_lens))
    if extra:
        notes.append(f"budget length(s) {', '.join(map(str, extra))} added to the sweep.")
    return sorted(set(seq_lens) | set(extra))


def variant_speedups(points: list[Point], variant_points: list[Point]) -> list[Point]:
    """``variant_points`` with ``speedup`` = float32 ONNX Runtime p50 / variant p50 at the same point."""
    base = {p.key(): p for p in points if p.runtime == ONNXRUNTIME}
    for p in variant_points:
        b = base.get(p.key())
        if b is not None and p.stats.p50_ms > 0:
            p.speedup = b.stats.p50_ms / p.stats.p50_ms
    return variant_points


def lengths_to_measure(model: Any, seq_lens: Sequence[int], budgets: Sequence[Budget],
                       batch_sizes: Sequence[int] = d.BATCH_SIZES) -> list[int]:
    """The lengths a profile of ``model`` would measure; ``BadInputError`` for budgets it cannot take
    or a sweep whose inputs would not fit in memory."""
    model = ordinary_view(model) if is_streaming(model) else model
    plans = plan_inputs(model)
    lengths = _sweep_lengths(model_axes(model, plans), list(seq_lens), list(budgets), [])
    _check_memory(plans, lengths, list(batch_sizes))
    return lengths


def _check_memory(plans: list[InputPlan], lengths: list[int], batch_sizes: list[int]) -> None:
    """Inputs of the largest point against the available memory (``seqgate.settings.memory``)."""
    features = sum(math.prod(int(x) for x in p.dims if x not in ("batch", "time")) for p in plans
                   if "time" in p.dims)
    check_input_memory(max(batch_sizes), max(lengths), max(features, 1), "the sweep's largest point")


def _sweep_batches(axes: Any, batches: list[int], notes: list[str]) -> list[int]:
    if axes.fixed_batch is not None and batches != [axes.fixed_batch]:
        notes.append(f"the model fixes its batch at {axes.fixed_batch}: the sweep uses batch "
                     f"{axes.fixed_batch} only.")
        return [axes.fixed_batch]
    return batches


def _outputs_agree(ort_out: list[Any], src_out: list[Any]) -> tuple[bool, str]:
    if len(ort_out) != len(src_out):
        return False, f"the source returns {len(src_out)} tensors, the ONNX model {len(ort_out)}"
    worst = 0.0
    for i, (a, b) in enumerate(zip(ort_out, src_out, strict=True)):
        a, b = np.asarray(a, np.float64), np.asarray(b, np.float64)
        if a.shape != b.shape:
            return False, f"output {i} has shape {list(b.shape)} in the source, {list(a.shape)} in ONNX"
        d = np.abs(a - b)
        worst = max(worst, float(d.max(initial=0.0)))
        if np.any(d > _SANITY_ATOL + _SANITY_RTOL * np.abs(b)):
            return False, f"output {i} differs by up to {worst:.3g}"
    return True, f"max |Δ| {worst:.3g}"


def profile_model(
    model_path: str | os.PathLike[str],
    *,
    seq_lens: str | Sequence[int] = d.SEQ_LENS,
    batch_sizes: str | Sequence[int] = d.BATCH_SIZES,
    threads: str | Sequence[int] = d.THREADS,
    warmup: int = d.WARMUP,
    min_runs: int = d.MIN_RUNS,
    min_time: float = d.MIN_TIME,
    budgets: Sequence[str | Budget] = (),
    percentile: int = d.PERCENTILE,
    source: str | None = None,
    weights: str | None = None,
    seed: int = d.SEED,
    progress: Progress | None = None,
    chunks: str | Sequence[int] = d.CHUNKS,
    call_budgets: Sequence[str | Budget] = (),
    lengths: str | os.PathLike[str] = d.LENGTHS,
    variants: Mapping[str, Any] | None = None,
    custom_code: str | os.PathLike[str] | None = None,
) -> ProfileReport:
    """Measure ``model_path`` over the sweep and judge the budgets (module docstring). Bad arguments or
    files (parsed by ``seqgate.settings``) raise ``BadInputError`` (exit 2) before anything is timed."""
    from seqgate.onnxfile.costs import summary
    from seqgate.onnxfile.load import load_onnx
    from seqgate.util.environment import environment

    opts = _options(locals())
    counts, q, seed = (opts["warmup"], opts["min_runs"], opts["min_time"]), opts["percentile"], opts["seed"]
    budget_list = list(opts["budget"])
    path = Path(model_path)
    stream_model = load_onnx(path)  # a streaming file: the sweep times its ordinary graph
    model = ordinary_view(stream_model) if is_streaming(stream_model) else stream_model
    notes: list[str] = []
    plans, axes, lengths, batch_list, thread_list = _plan_sweep(model, opts, budget_list, notes)
    draws = _length_draws(opts["lengths"], model, plans, notes)
    src = _parse_source(source, weights, custom_code)
    _note_oversubscription(thread_list, notes)
    cost = summary(model)  # one pass of the cost model (two shape inferences) for every length
    sweep = _Sweep(model, plans, _open_runner(src, model, thread_list), seed, counts, progress or SILENT,
                   variants)
    sweep.draws, sweep.cost = draws, cost
    points, sessions = sweep.run(thread_list, batch_list, lengths)
    notes.extend(sweep.notes)
    attach_speedups(points)
    points += variant_speedups(points, sweep.variant_points)
    _note_short_tails(points, q, notes)
    fits = fits_for(points, q, budget_list, notes)
    return ProfileReport(
        streaming=_streaming(stream_model, plans, opts, batch_list, thread_list, counts),
        model=_model_record(path, cost, plans, axes),
        source=_source_record(src, sweep.agreement),
        options={"seq_lens": lengths, "batch_sizes": batch_list, "threads": thread_list, "warmup": counts[0],
                 "min_runs": counts[1], "min_time": counts[2], "percentile": q,
                 "budgets": [b.to_json() for b in budget_list], "lengths": str(opts["lengths"])},
        seed=seed, points=points, fits=fits, budgets=budget_checks(points, budget_list, q, fits),
        environment={**environment(), "session_options": sessions}, timer=timer_overhead(), notes=notes,
    )


def _streaming(model: Any, plans: list[InputPlan], opts: dict[str, Any], batch_list: list[int],
               thread_list: list[int], counts: tuple[int, int, float]) -> dict[str, Any] | None:
    """Per-call latency of a streaming file (``seqgate.profile.streaming``) at the smallest batch."""
    if not is_streaming(model):
        return None
    from seqgate.profile.streaming import profile_calls

    return profile_calls(model, plans, list(opts["chunks"]), list(opts["call_budget"]), min(batch_list),
                         thread_list, opts["seed"], counts, opts["percentile"], time_call)


def _length_draws(how: Any, model: Any, plans: list[InputPlan],
                  notes: list[str]) -> tuple[str, Any, int] | None:
    """``None`` for full-length batches only; else (label, recorded valid-step counts or None, min length)."""
    if how == "full":
        return None
    if not padded_model(plans):
        raise BadInputError(
            f"lengths {str(how)!r}: the model takes no lengths and no mask (its ONNX file has no "
            f"seqgate.padding record naming an input), so every batch it sees is full-length. Drop the "
            f"lengths setting, or export the model that pads (Masking, Embedding(mask_zero=True), "
            f"pack_padded_sequence with a lengths input).")
    from seqgate.verify.synthetic import read_padding

    padding = read_padding(model)
    min_length = max((int(e.get("min_length", 1)) for e in padding), default=1)
    if how == "uniform":
        notes.append("padded points: each row's length uniform in 1..T (right padding), beside the "
                      "full-length points; budgets judge the full-length ones.")
        return "uniform", None, min_length
    recorded = _recorded_lengths(Path(how), model, padding)
    notes.append(f"padded points: row lengths drawn from the {recorded.size} windows of {how} (mean "
                 f"{recorded.mean():.1f} valid steps; longer than T: cut to T), beside the full-length "
                 f"points; budgets judge the full-length ones.")
    return "recording", recorded, min_length


def _recorded_lengths(path: Path, model: Any, padding: list[dict[str, Any]]) -> Any:
    """Valid steps per window of a recording, from its lengths array or its padding values."""
    from seqgate.verify.padded_steps import window_lengths
    from seqgate.verify.recordings import input_specs, load_recording

    rec = load_recording(path, input_specs(model))
    for entry in padding:
        counts = window_lengths(rec.arrays, entry, rec.label)
        if counts is not None:
            return counts
    raise BadInputError(f"recording {path} holds none of the arrays the model's padding is read from "
                        f"({', '.join(sorted({e.get('lengths') or e.get('input', '') for e in padding}))}); "
                        f"give a recording of the model's inputs.")


def _model_record(path: Path, cost: dict[str, Any], plans: list[Any], axes: Any) -> dict[str, Any]:
    from seqgate.util.files import sha256_file

    return {"path": str(path), "sha256": sha256_file(path), "cost": cost,
            "inputs": [{"name": p.name, "dtype": p.dtype, "dims": list(p.dims), "vocab": p.vocab}
                       for p in plans],
            "fixed_time": axes.fixed_time, "fixed_batch": axes.fixed_batch}


def _plan_sweep(model: Any, opts: dict[str, Any], budget_list: list[Budget],
                notes: list[str]) -> tuple[Any, ...]:
    """Input plans, axes, and the lengths, batch sizes and thread counts to measure (memory checked)."""
    plans = plan_inputs(model)
    axes = model_axes(model, plans)
    lengths = _sweep_lengths(axes, list(opts["seq_lens"]), budget_list, notes)
    batch_list = _sweep_batches(axes, list(opts["batch_sizes"]), notes)
    thread_list = list(opts["threads"])
    _check_memory(plans, lengths, batch_list)
    return plans, axes, lengths, batch_list, thread_list


def _note_short_tails(points: list[Point], q: int, notes: list[str]) -> None:
    if q == 99 and min(p.stats.runs for p in points) < 100:
        notes.append("some points have fewer than 100 runs: their p99 is close to their max; raise "
                     "--min-runs or --min-time for a steadier tail.")


def _note_oversubscription(thread_list: list[int], notes: list[str]) -> None:
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    if max(thread_list) > cores:
        notes.append(f"--threads {max(thread_list)} is more than the {cores} cores this process may use; "
                     f"those points measure oversubscription.")


def _options(args: dict[str, Any]) -> dict[str, Any]:
    """``profile_model``'s arguments through ``seqgate.settings``; every problem in one error (exit 2)."""
    problems = Problems()
    keys = ("seq_lens", "batch_sizes", "threads", "warmup", "min_runs", "min_time", "percentile", "lengths")
    raw = {**{k: args[k] for k in keys}, "budget": args["budgets"], "chunks": args["chunks"],
           "call_budget": args["call_budgets"]}
    opts = parse_settings("profile", raw, PYTHON, problems)
    opts["seed"] = problems.take(parse_seed, args["seed"], "argument seed")
    problems.raise_if_any()
    return opts


def _parse_source(source: str | None, weights: str | None, custom_code: str | os.PathLike[str] | None) -> Any:
    from seqgate.sources.spec import parse_source

    if source is None:
        for given, option, meaning in ((weights, "--weights", "the PyTorch factory"),
                                       (custom_code, "--custom-code", "the Keras file")):
            if given:
                raise BadInputError(f"{option} was given without --source; pass {meaning} with --source, "
                                    f"or drop {option}.")
        return None
    return parse_source(source, weights, custom_code)


def _open_runner(src: Any, model: Any, thread_list: list[int]) -> Any:
    if src is None:
        return None
    from seqgate.onnxfile.input_meta import read_structure
    from seqgate.runtimes.factory import open_source_runner

    return open_source_runner(src, [], [o.name for o in model.graph.output], states=False,
                              threads=thread_list[0], structure=read_structure(model))


def _source_record(src: Any, agreement: tuple[bool, str] | None) -> dict[str, Any] | None:
    from seqgate.util.files import sha256_file

    if src is None:
        return None
    return {
        "text": src.text, "framework": src.framework,
        "files": [{"path": str(f), "sha256": sha256_file(f)} for f in src.files()],
        "outputs_agree": agreement[0] if agreement else None,
        "outputs_check": agreement[1] if agreement else None,
    }


class _Sweep:
    """The nested loop threads → batch → T, ONNX Runtime then the source at each point."""

    def __init__(self, model: Any, plans: list[InputPlan], runner: Any, seed: int,
                 counts: tuple[int, int, float], progress: Progress,
                 variants: Mapping[str, Any] | None = None) -> None:
        self.model, self.plans, self.runner, self.seed = model, plans, runner, seed
        self.counts = counts
        self.progress = progress
        self.notes: list[str] = []
        self.agreement: tuple[bool, str] | None = None
        self.draws: tuple[str, Any, int] | None = None  # (label, recorded lengths or None, min length)
        self.cost: dict[str, Any] = {"macs_per_sequence": 0, "macs_per_step": 0}
        self.variants: dict[str, Any] = dict(variants or {})
        self.variant_points: list[Point] = []

    def run(self, thread_list: list[int], batch_list: list[int],
            lengths: list[int]) -> tuple[list[Point], list[dict[str, Any]]]:
        from seqgate.runtimes.onnx import OnnxRunner

        per_point = (2 if self.runner else 1) * (2 if self.draws else 1) + len(self.variants)
        total = len(thread_list) * len(batch_list) * len(lengths) * per_point
        self.progress.start(f"profiling {total} points", total)
        points: list[Point] = []
        sessions: list[dict[str, Any]] = []
        for th in thread_list:
            ort = OnnxRunner(self.model, [], th, timing=True)
            sessions.append(ort.recorded)
            others = {f"{ONNXRUNTIME}:{k}": OnnxRunner(m, [], th, timing=True)
                      for k, m in self.variants.items()}
            for b in batch_list:
                for t in lengths:
                    feeds = make_inputs(self.plans, b, t, self.seed)
                    points += self._measure(ort, feeds, (t, b, th), "full", b * t, others)
                    if self.draws is not None:
                        label, recorded, min_length = self.draws
                        rows = draw_lengths(recorded, b, t, self.seed, min_length)
                        points += self._measure(ort, pad_batch(self.plans, feeds, rows), (t, b, th), label,
                                                int(rows.sum()))
        self.progress.finish()
        return points, sessions

    def _measure(self, ort: Any, feeds: dict[str, Any], at: tuple[int, int, int], label: str,
                 valid: int, others: dict[str, Any] | None = None) -> list[Point]:
        """ONNX Runtime's point at ``at = (T, batch, threads)``, the variants' (``others``), the source's."""
        t, b, th = at
        macs = self.cost["macs_per_sequence"] + round(self.cost["macs_per_step"] * valid / b)
        shown = "" if label == "full" else f" padded ({label})"
        out: list[Point] = []
        with ort.timed_call(feeds) as call:
            self.progress.advance(0, f"{ONNXRUNTIME} T={t} batch={b} threads={th}{shown}")
            out.append(Point(t, b, th, ONNXRUNTIME, summarize_ns(time_call(call, *self.counts)), macs,
                             lengths=label, valid_steps=valid))
            self.progress.advance(1)
            self._time_variants(others or {}, feeds, at, macs)
            if self.runner is not None:
                self.progress.advance(0, f"{self.runner.runtime} T={t} batch={b} threads={th}{shown}")
                src = self._source_point(call, feeds, t, b, th, macs)
                src.lengths, src.valid_steps = label, valid
                out.append(src)
                self.progress.advance(1)
        return out

    def _time_variants(self, others: dict[str, Any], feeds: dict[str, Any], point: tuple[int, int, int],
                       macs: int) -> None:
        """Each variant at this point, right after the float32 file (same inputs); see the docstring."""
        t, b, th = point
        for label, runner in others.items():
            with runner.timed_call(feeds) as vcall:
                self.progress.advance(0, f"{label} T={t} batch={b} threads={th}")
                stats = summarize_ns(time_call(vcall, *self.counts))
                self.variant_points.append(Point(t, b, th, label, stats, macs))
                self.progress.advance(1)

    def _source_point(self, ort: Callable[[], Any], feeds: dict[str, Any], t: int, b: int, th: int,
                      macs: int) -> Point:
        runner = self.runner
        try:
            with runner.timed_call(feeds, th) as call:
                if self.agreement is None:
                    self._check_agreement(ort, call)
                samples = time_call(call, *self.counts)
                used = runner.framework_threads()
        except Exception as e:  # the user's model code failing on the ONNX model's inputs
            shapes = ", ".join(f"{k} {list(v.shape)} {v.dtype}" for k, v in feeds.items())
            raise BadInputError(
                f"the {runner.runtime} source failed on the inputs the ONNX model takes ({shapes}) at "
                f"T={t}, batch {b}: {type(e).__name__}: {first_line(e)}. The source must take "
                f"the exported graph's inputs, in its order and layout; is it the model that was exported?"
            ) from e
        if runner.runtime == "keras" and used != th:
            note = (f"TensorFlow runs with {used or 'its default'} intra-op threads (its thread pool is "
                    f"fixed at start-up), not the point's threads.")
            if note not in self.notes:
                self.notes.append(note)
        return Point(t, b, th, runner.runtime, summarize_ns(samples), macs, framework_threads=used)

    def _check_agreement(self, ort: Callable[[], Any], call: Callable[[], Any]) -> None:
        from seqgate.util.frameworks import quiet_stderr

        with quiet_stderr():  # TensorFlow may warn on stderr while tracing the first call
            src_out = self.runner.outputs(call())
        self.agreement = _outputs_agree([np.asarray(r) for r in ort()], src_out)
        if not self.agreement[0]:
            self.notes.append(f"the source's outputs do not match the ONNX model's "
                              f"({self.agreement[1]}): is it the model that was exported? "
                              f"The speed-ups compare different computations; run seqgate verify.")

