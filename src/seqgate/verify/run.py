"""``verify_model``: replay windows through the source framework and ONNX Runtime and compare.

Contract:
- Compared tensors: every graph output and, unless ``states=False``, every probe of the probe
  map (``seqgate.probes``), all in DESIGN.md's axes. Order = graph order: probes in map order
  (the exporter records them as it emits nodes), then the outputs.
- Rule: ``|onnx − source| ≤ atol + rtol·|source|`` elementwise (``seqgate.compare``), with
  per-tensor overrides from the tolerance file.
- Each recording, and each synthetic kind, is its own *set*; stats are kept per set and per
  tensor, streaming batch by batch (memory flat), then merged per tensor for the headline.
- First divergence: the earliest tensor in graph order that leaves tolerance in any set; the
  first set (in processing order) where it does, the first step outside tolerance (for
  time-indexed tensors) and the worst window there.
- Class-score outputs: the producing op (through Identity) is Softmax/LogSoftmax/Sigmoid, or
  ``task="classify"`` marks every output (``"regress"`` none); their top-1 agreement and label
  flips are reported.
- Outputs are compared batch-major (DESIGN.md ``[batch, time, ...]``): an output whose windows
  axis is not 0 (PyTorch ``h_n`` ``[L·D, N, H]``: the ONNX dim named like the input batch dim,
  else the first axis as long as the batch) is moved to axis 0; the entry's ``batch_axis``
  says where it was.
- Time-indexed outputs: rank ≥ 3 and (batch-major) axis 1 is the input's time dim (by ONNX dim
  name; when the dim is unnamed, by length).
- Synthetic sets take their per-feature scale from the first recording.
- The report never claims more than was compared: a file without a probe map is compared on
  outputs only and says so in ``warnings``.
- Provenance (``seqgate.verify.provenance``): the sha256 of the given source, weights and custom-code
  files against those the ONNX file records; the result is the report's ``provenance`` section, and a
  difference, or an untrained export, is also a warning. It does not change the verdict, which
  is about what the files compute; the gate makes provenance its own check.
- ``observe(recording, first_window, onnx_outputs, source_outputs)``, when given, sees every
  batch's outputs by tensor name (a variant's task-level figures are computed this way).
- The ONNX file's inputs must be the source model's (names; ranks and fixed dims): a file whose
  inputs or outputs do not fit is bad input (exit 2) naming what differs.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from seqgate.errors import BadInputError
from seqgate.onnxfile.probes import Probe, read_metadata, read_probe_map
from seqgate.settings import PYTHON, Problems, Tolerances, parse_settings
from seqgate.settings import defaults as d
from seqgate.sources.spec import Source, parse_source
from seqgate.util.files import sha256_file
from seqgate.util.progress import SILENT, Progress
from seqgate.verify.checker import Comparer, SetResult, TensorInfo, output_dims, tensor_infos
from seqgate.verify.compare import merge_stats
from seqgate.verify.recordings import (
    InputSpec,
    Recording,
    feature_stats,
    input_specs,
    load_recording,
    to_model_layout,
)
from seqgate.verify.tolerances import read_tolerances

SCHEMA = "seqgate.verify/1"
CLASS_OPS = ("Softmax", "LogSoftmax", "Sigmoid")


@dataclass
class VerifyReport:
    """Everything verify found; :meth:`to_json` is the ``seqgate.verify/1`` document."""

    passed: bool
    tensors: list[dict[str, Any]]
    first_divergence: dict[str, Any] | None
    recordings: list[dict[str, Any]]
    model: dict[str, Any]
    source: dict[str, Any]
    seed: int
    settings: dict[str, Any]
    environment: dict[str, Any]
    oracle: dict[str, Any] | None = None
    warnings: list[str] = field(default_factory=list)
    provenance: dict[str, Any] | None = None
    streaming: dict[str, Any] | None = None  # seqgate.verify.streaming, for a streaming file
    long_stream: dict[str, Any] | None = None  # seqgate.verify.long_stream, for a streaming file
    workers: dict[str, Any] | None = None  # Ray workers' record (seqgate.verify.cluster), else None

    @property
    def exit_code(self) -> int:
        return 0 if self.passed else 1

    def headline(self) -> str:
        if self.passed:
            worst = max((t["metrics"]["max_abs"] or 0.0 for t in self.tensors), default=0.0)
            return (f"PASSED: {len(self.tensors)} tensors on {len(self.recordings)} recordings within "
                    f"tolerance (largest |Δ| {worst:.3g}).")
        if self.first_divergence is None and self.streaming and not self.streaming["passed"]:
            fails = [f for r in self.streaming["runs"] for f in r["failures"]]
            return f"FAILED: streaming check: {fails[0] if fails else 'see the streaming section'}"
        if self.first_divergence is None and self.long_stream and self.long_stream["first_failure"]:
            return f"FAILED: long-stream check: {self.long_stream['first_failure']['message']}"
        fd = self.first_divergence or {}
        step = f" from step {fd['step']}" if fd.get("step") is not None else ""
        return (f"FAILED: first divergence at {fd.get('kind')} '{fd.get('tensor')}'"
                f"{' (layer ' + str(fd['layer']) + ')' if fd.get('layer') else ''}{step} in "
                f"{fd.get('recording')}, window {fd.get('window')}: max |Δ| {fd.get('max_abs', 0):.3g} "
                f"(atol {fd.get('atol'):g}, rtol {fd.get('rtol'):g}); {fd.get('outside')} elements outside.")

    def to_json(self) -> dict[str, Any]:
        return {
            "schema": SCHEMA, "passed": self.passed, "headline": self.headline(),
            "first_divergence": self.first_divergence, "tensors": self.tensors,
            "recordings": self.recordings, "model": self.model, "source": self.source,
            "provenance": self.provenance, "streaming": self.streaming, "long_stream": self.long_stream,
            "seed": self.seed, "settings": self.settings, "oracle": self.oracle,
            "warnings": self.warnings, "environment": self.environment, "workers": self.workers,
            "seqgate_version": self.environment.get("seqgate"),
        }


# ----- setup ---------------------------------------------------------------------------------
def _class_outputs(model: Any) -> set[str]:
    producer = {o: n for n in model.graph.node for o in n.output if o}
    found = set()
    for out in model.graph.output:
        n = producer.get(out.name)
        while n is not None and n.op_type == "Identity":
            n = producer.get(n.input[0])
        if n is not None and n.op_type in CLASS_OPS:
            found.add(out.name)
    return found


def _check_interface(model: Any, src: Source, loaded: Any, recs: list[Recording], specs: list[InputSpec],
                     onnx_runner: Any, label: str) -> None:
    """The ONNX file's inputs/outputs against the source's (``seqgate.verify.interface``); exit 2."""
    from seqgate.verify.interface import check_keras, check_torch

    if src.framework == "keras":
        check_keras(model, loaded, label, src.text)
        return
    feeds = None
    if recs and recs[0].windows:
        feeds = to_model_layout(next(iter(recs[0].batches(1)))[1], specs)
    check_torch(model, loaded, feeds, onnx_runner, label, src.text)


def _check_framework(model: Any, src: Source) -> None:
    meta = read_metadata(model)
    fw = meta.get("seqgate.source.framework")
    if fw and fw != src.framework:
        raise BadInputError(f"the ONNX file was exported from a {fw} model, but --source is a {src.framework} "
                            f"source ({src.text}). Verify against the model it was exported from.")


def _provenance(model: Any, src: Source, warnings: list[str]) -> dict[str, Any]:
    from seqgate.verify.provenance import compare_provenance

    prov = compare_provenance(model, src)
    if prov["untrained"]:
        warnings.append("UNTRAINED model: the ONNX file was exported from the factory's initial parameters "
                        "without weights (--untrained).")
    if prov["status"] == "differs":
        warnings.append(f"provenance: {prov['detail']}; the comparison below says whether they still "
                        f"compute the same.")
    return prov


# ----- report --------------------------------------------------------------------------------
def _tensor_entry(t: TensorInfo, results: list[SetResult], batch_axis: int) -> dict[str, Any]:
    parts = [r.stats[t.name] for r in results if t.name in r.stats]
    merged = merge_stats(parts)
    by = {}
    for r in results:
        st = r.stats.get(t.name)
        if st is not None:
            by[r.recording.label] = {"metrics": st.metrics(), "passed": st.passed,
                                     "per_step_max_abs": st.per_step_max_abs()}
    return {"name": t.name, "kind": t.kind, "layer": t.layer, "direction": t.direction,
            "atol": merged.atol, "rtol": merged.rtol, "passed": merged.passed,
            "metrics": merged.metrics(), "per_step_max_abs": merged.per_step_max_abs(), "by_recording": by,
            "batch_axis": batch_axis}


def _first_divergence(infos: list[TensorInfo], results: list[SetResult]) -> dict[str, Any] | None:
    for t in infos:
        for r in results:
            st = r.stats.get(t.name)
            if st is None or st.passed:
                continue
            m = st.metrics()
            return {"tensor": t.name, "kind": t.kind, "layer": t.layer, "direction": t.direction,
                    "recording": r.recording.label, "step": st.first_bad_step(),
                    "window": m["worst"]["window"] if m["worst"] else None, "max_abs": m["max_abs"],
                    "outside": st.outside, "atol": st.atol, "rtol": st.rtol, "worst": m["worst"]}
    return None


def verify_model(
    model_path: str | Path,
    source: str | Source,
    weights: str | None = None,
    recordings: Sequence[str | Path] = (),
    synthetic: bool = d.SYNTHETIC,
    atol: float | None = None,
    rtol: float | None = None,
    tolerances: str | Tolerances | None = None,
    batch_size: int = d.BATCH_SIZE,
    states: bool = d.STATES,
    oracle: bool = d.ORACLE,
    progress: Progress | None = None,
    task: str | None = d.TASK,
    seed: int = d.SEED,
    chunk: int = d.CHUNK,
    long_stream_factor: int = d.LONG_STREAM_FACTOR,
    observe: Any = None,
    workers: int = d.WORKERS,
    cluster: str = d.CLUSTER,
    custom_code: str | Path | None = None,
) -> VerifyReport:
    """Compare the ONNX file with its source on every window; see the module docstring.

    ``workers``/``cluster``: on Ray workers (``seqgate.verify.cluster``), same report + ``workers``.
    Settings go through ``seqgate.settings``; ``tolerances`` is a tolerance file (``atol``/``rtol``
    on top of it) or a :class:`Tolerances` value (``atol``/``rtol`` ignored). ``custom_code``: a Keras
    source's file of custom classes (run before loading, compared in the provenance)."""
    from seqgate.onnxfile.load import load_onnx

    opts, tol = _settings(locals())
    synthetic, batch_size, states, oracle, task, seed = (opts[k] for k in (
        "synthetic", "batch_size", "states", "oracle", "task", "seed"))
    windows = list(recordings)
    if not windows and not synthetic:
        raise BadInputError("nothing to compare: give recorded windows with --recording REC.npz and/or "
                            "--synthetic.")
    tolerances = None if isinstance(tolerances, Tolerances) else tolerances  # built by the gate config
    path = Path(model_path)
    stream_model, model = _split_streaming(load_onnx(path))
    src = source if isinstance(source, Source) else parse_source(source, weights, custom_code)
    prov, probes, warnings = _check_source(model, src, states)
    specs = input_specs(model)
    recs = _window_sets(model, specs, windows, synthetic, batch_size, seed)
    infos = tensor_infos(model, probes)
    warnings += [f"tolerance pattern {p!r} matches no tensor" for p in tol.unmatched([t.name for t in infos])]
    onnx_runner, src_runner = _runners(model, src, probes, states, recs, specs, str(path))
    comparer = Comparer(infos, tol, _classes(model, task), specs, output_dims(model))
    comparer.where, comparer.observe = (str(path), src.text), observe
    comparer.window_scores = oracle  # the worst windows are read by the oracle only
    results, ray_record = _compare_all(comparer, recs, onnx_runner, src_runner, path, src, opts, tol,
                                       progress or SILENT)
    oracle_out = _oracle(model, probes, infos, results, onnx_runner, src_runner, tol) if oracle else None
    streaming = _streaming(stream_model, recs, specs, src_runner, tol, opts["chunk"])
    long_stream = _long_stream(stream_model, recs, specs, src_runner, tol, opts)
    report = _report(infos, results, comparer, path, specs, src, seed, opts, tol, tolerances, oracle_out,
                     warnings, prov, ray_record, streaming)
    report.long_stream = long_stream
    report.passed = report.passed and (long_stream is None or long_stream["passed"])
    return report


def _report(infos: list[TensorInfo], results: list[SetResult], comparer: Comparer, path: Path,
            specs: list[InputSpec], src: Source, seed: int, opts: dict[str, Any], tol: Tolerances,
            tolerances: str | None, oracle_out: Any, warnings: list[str], prov: Any,
            ray_record: dict[str, Any] | None, streaming: dict[str, Any] | None) -> VerifyReport:
    from seqgate.util.environment import environment

    first = _first_divergence(infos, results)
    return VerifyReport(
        passed=first is None and (streaming is None or streaming["passed"]), streaming=streaming,
        tensors=[_tensor_entry(t, results, comparer.batch_axis.get(t.name, 0)) for t in infos],
        first_divergence=first, recordings=[r.recording.to_json() for r in results],
        model=_model_record(path, specs), source=_source_record(src), seed=seed,
        settings={**{k: opts[k] for k in ("batch_size", "states", "synthetic", "task", "oracle", "workers",
                                          "cluster")},
                  "atol": tol.atol, "rtol": tol.rtol, "tolerances_file": tolerances,
                  "tolerance": [o.to_json() for o in tol.overrides]},
        environment=environment(), oracle=oracle_out, warnings=warnings, provenance=prov, workers=ray_record)


def _oracle(model: Any, probes: list[Probe], infos: list[Any], results: Any, onnx_runner: Any,
            src_runner: Any, tol: Tolerances) -> Any:
    """The ``onnx.reference`` third opinion on the worst windows (``seqgate.verify.oracle``)."""
    from seqgate.verify.oracle import run_oracle

    return run_oracle(model, probes, infos, results, onnx_runner, src_runner, tol)


def _split_streaming(model: Any) -> tuple[Any, Any]:
    """(the streaming file or None, the graph compared with the source: its ordinary view)."""
    from seqgate.export.streaming import is_streaming, ordinary_view

    return (model, ordinary_view(model)) if is_streaming(model) else (None, model)


def _streaming(stream_model: Any, recs: list[Recording], specs: list[InputSpec], src_runner: Any,
               tol: Tolerances, chunk: int) -> dict[str, Any] | None:
    """The streaming section (``seqgate.verify.streaming``) of a streaming file; None otherwise."""
    if stream_model is None:
        return None
    from seqgate.verify.streaming import verify_streaming

    return verify_streaming(stream_model, recs, specs, src_runner.run, tol.atol, tol.rtol, chunk)


def _long_stream(stream_model: Any, recs: list[Recording], specs: list[InputSpec], src_runner: Any,
                 tol: Tolerances, opts: dict[str, Any]) -> dict[str, Any] | None:
    """The long-stream section (``seqgate.verify.long_stream``) of a streaming file; None otherwise."""
    if stream_model is None:
        return None
    from seqgate.verify.long_stream import long_stream_check

    return long_stream_check(stream_model, recs, specs, src_runner, tol, opts["long_stream_factor"],
                             opts["seed"], opts["batch_size"])


def _model_record(path: Path, specs: list[InputSpec]) -> dict[str, Any]:
    return {"path": str(path), "sha256": sha256_file(path),
            "inputs": [{"name": s.name, "dtype": s.dtype.name, "dims": list(s.dims)} for s in specs]}


def _source_record(src: Source) -> dict[str, Any]:
    return {"text": src.text, "framework": src.framework,
            "files": [{"path": str(f), "sha256": sha256_file(f)} for f in src.files()]}


def _check_source(model: Any, src: Source, states: bool) -> tuple[Any, list[Probe], list[str]]:
    """Framework and provenance checks; the probes to compare (none when ``states`` is off); warnings."""
    warnings: list[str] = []
    _check_framework(model, src)
    prov = _provenance(model, src, warnings)
    probes = read_probe_map(model) if states else []
    if states and not probes:
        warnings.append("the ONNX file has no seqgate probe map: only the model outputs were compared.")
    return prov, probes, warnings


def _window_sets(model: Any, specs: list[InputSpec], windows: list[str | Path], synthetic: bool,
                 batch_size: int, seed: int) -> list[Recording]:
    """The recordings as given, then the synthetic sets (scaled from the first recording's statistics)."""
    from seqgate.onnxfile.input_meta import read_ranges
    from seqgate.verify.padded_steps import add_padding_counts
    from seqgate.verify.synthetic import read_padding, require_steps, synthetic_sets
    from seqgate.verify.value_ranges import check_value_ranges

    padding, ranges = read_padding(model), read_ranges(model)
    recs = [load_recording(w, specs) for w in windows]
    for rec in recs:  # the graph is right only inside the declared value ranges
        check_value_ranges(rec, specs, ranges)
    add_padding_counts(recs, padding)
    if synthetic:
        stats = feature_stats(recs[0], batch_size) if recs else None
        recs += synthetic_sets(specs, stats, seed, padding=padding, ranges=ranges)
    require_steps(specs, recs)  # a verification of one step would pass without testing recurrence
    return recs


def _runners(model: Any, src: Source, probes: list[Probe], states: bool, recs: list[Recording],
             specs: list[InputSpec], label: str) -> tuple[Any, Any]:
    """ONNX Runtime's runner and the source framework's, after checking the file fits the source."""
    from seqgate.onnxfile.input_meta import read_structure
    from seqgate.runtimes.factory import load_source_model, open_source_runner
    from seqgate.runtimes.onnx import OnnxRunner
    from seqgate.verify.pipeline import thread_plan

    plan = thread_plan()  # the two runtimes run side by side (seqgate.verify.pipeline)
    onnx_runner = OnnxRunner(model, probes, threads=plan.onnx)
    loaded = load_source_model(src, plan.source)
    _check_interface(model, src, loaded, recs, specs, onnx_runner, label)
    output_names = [o.name for o in model.graph.output]
    src_runner = open_source_runner(src, probes, output_names, states, loaded=loaded,
                                    structure=read_structure(model))
    if src.framework == "torch":
        src_runner.run_threads = plan.source
    return onnx_runner, src_runner


def _classes(model: Any, task: str | None) -> set[str]:
    """Outputs judged as class scores (top-1 agreement): all for classify, none for regress, else guessed."""
    if task == "classify":
        return {o.name for o in model.graph.output}
    if task == "regress":
        return set()
    return _class_outputs(model)


def _settings(args: dict[str, Any]) -> tuple[dict[str, Any], Tolerances]:
    """``verify_model``'s arguments through ``seqgate.settings``; every problem in one error (exit 2)."""
    problems = Problems()
    raw = {k: args[k] for k in ("synthetic", "seed", "batch_size", "states", "task", "oracle", "chunk",
                                 "long_stream_factor", "workers", "cluster")}
    opts = parse_settings("verify", {**raw, "task": raw["task"] or d.TASK}, PYTHON, problems)
    tol = args["tolerances"]
    if not isinstance(tol, Tolerances):
        tol = read_tolerances(tol, args["atol"], args["rtol"], problems, "argument atol", "argument rtol")
    problems.raise_if_any()
    return opts, tol


def _run_all(comparer: Comparer, recs: list[Recording], onnx_runner: Any, src_runner: Any, batch: int,
             progress: Progress) -> list[SetResult]:
    check = [True]
    progress.start(f"verifying {len(recs)} window set{'s' if len(recs) != 1 else ''}",
                   sum(r.windows for r in recs))
    results = [comparer.run_set(r, onnx_runner, src_runner, batch, progress, check) for r in recs]
    progress.finish()
    return results


def _compare_all(comparer: Comparer, recs: list[Recording], onnx_runner: Any, src_runner: Any, path: Path,
                 src: Source, opts: dict[str, Any], tol: Tolerances,
                 progress: Progress) -> tuple[list[SetResult], dict[str, Any] | None]:
    """Every window set compared, in this process or on Ray workers (then also their record)."""
    if opts["workers"] or opts["cluster"]:
        return _run_on_ray(comparer, recs, path, src, opts, tol, progress)
    return _run_all(comparer, recs, onnx_runner, src_runner, opts["batch_size"], progress), None


def _run_on_ray(comparer: Comparer, recs: list[Recording], path: Path, src: Source, opts: dict[str, Any],
                tol: Tolerances, progress: Progress) -> tuple[list[SetResult], dict[str, Any]]:
    """The windows checked by Ray workers; the comparer learns the batch axes they found."""
    from seqgate.verify.cluster import WorkerJob, absolute_source, run_sharded

    job = WorkerJob(str(path.resolve()), absolute_source(src), opts["states"], tol,
                    frozenset(comparer.class_names), opts["batch_size"], (), comparer.where)
    results, batch_axis, record = run_sharded(job, recs, opts["workers"], opts["cluster"], progress)
    comparer.batch_axis.update(batch_axis)
    return results, record
