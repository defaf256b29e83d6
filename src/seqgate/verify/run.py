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
- Provenance (``seqgate.verify.provenance``): the sha256 of the given source and weights files
  against those the ONNX file records; the result is the report's ``provenance`` section, and a
  difference, or an untrained export, is also a warning. It does not change the verdict, which
  is about what the files compute; the gate makes provenance its own check.
- The ONNX file's inputs must be the source model's (names; ranks and fixed dims): a file whose
  inputs or outputs do not fit is bad input (exit 2) naming what differs.
"""

from __future__ import annotations

import heapq
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from seqgate.errors import BadInputError, Unsupported, UnsupportedModelError
from seqgate.onnxfile.probes import Probe, read_metadata, read_probe_map
from seqgate.settings import PYTHON, Problems, Tolerances, parse_settings
from seqgate.settings import defaults as d
from seqgate.sources.spec import Source, parse_source
from seqgate.util.files import sha256_file
from seqgate.util.progress import SILENT, Progress
from seqgate.verify.compare import TensorStats, merge_stats
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
WORST_KEPT = 3  # windows per set kept for the oracle
CLASS_OPS = ("Softmax", "LogSoftmax", "Sigmoid")


@dataclass(frozen=True)
class TensorInfo:
    name: str
    kind: str  # output | hidden_sequence | hidden_final | cell_final
    layer: str | None = None
    direction: str | None = None


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

    @property
    def exit_code(self) -> int:
        return 0 if self.passed else 1

    def headline(self) -> str:
        if self.passed:
            worst = max((t["metrics"]["max_abs"] or 0.0 for t in self.tensors), default=0.0)
            return (f"PASSED: {len(self.tensors)} tensors on {len(self.recordings)} recordings within "
                    f"tolerance (largest |Δ| {worst:.3g}).")
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
            "provenance": self.provenance,
            "seed": self.seed, "settings": self.settings, "oracle": self.oracle,
            "warnings": self.warnings, "environment": self.environment,
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


def output_dims(model: Any) -> dict[str, list[Any]]:
    from seqgate.onnxfile.load import value_dims

    return {o.name: value_dims(o) for o in model.graph.output}


def tensor_infos(model: Any, probes: list[Probe]) -> list[TensorInfo]:
    infos = [TensorInfo(p.name, p.kind, p.layer, p.direction) for p in probes]
    return infos + [TensorInfo(o.name, "output") for o in model.graph.output]


# ----- the run -------------------------------------------------------------------------------
@dataclass
class _SetResult:
    recording: Recording
    stats: dict[str, TensorStats]
    worst: list[tuple[float, int, dict[str, np.ndarray[Any, Any]]]]


class Comparer:
    """Runs one window set through both runners and keeps per-tensor stats (module docstring)."""

    def __init__(self, infos: list[TensorInfo], tol: Tolerances, class_names: set[str], specs: list[InputSpec],
                 out_dims: dict[str, list[Any]]):
        self.infos, self.tol, self.class_names, self.out_dims = infos, tol, class_names, out_dims
        self.specs = specs
        self.seq_input = next((s.name for s in specs if s.is_sequence), None)
        self.time_dims = {s.window_dims[1] for s in specs
                          if s.is_sequence and isinstance(s.window_dims[1], str)}
        self.batch_dims = {s.window_dims[0] for s in specs if s.dims and isinstance(s.window_dims[0], str)}
        self.batch_axis: dict[str, int] = {}
        self.where = ("the ONNX file", "the source")  # (model label, source text) for messages

    def _find_batch_axis(self, name: str, shape: tuple[int, ...], n: int) -> int:
        """Outputs may hold the windows on another axis (PyTorch ``h_n`` is ``[L·D, N, H]``)."""
        dims = self.out_dims.get(name, [])
        named = [i for i, d in enumerate(dims) if d in self.batch_dims]
        if named:
            return named[0]
        sized = [i for i, d in enumerate(shape) if d == n]
        return 0 if not sized or sized[0] == 0 else sized[0]

    def to_batch_major(self, name: str, x: np.ndarray[Any, Any]) -> np.ndarray[Any, Any]:
        ax = self.batch_axis.get(name, 0)
        return x if ax == 0 else np.moveaxis(x, ax, 0)

    def _timed_output(self, name: str, shape: tuple[int, ...], steps: int | None) -> bool:
        """Axis 1 is time: the ONNX dim names the input's time dim, else (unknown dim) its length matches."""
        if len(shape) < 3:
            return False
        dims = list(self.out_dims.get(name, []))
        ax = self.batch_axis.get(name, 0)
        if ax and len(dims) > ax:
            dims.insert(0, dims.pop(ax))
        d1 = dims[1] if len(dims) > 1 else None
        if isinstance(d1, str) and d1:
            return d1 in self.time_dims
        return d1 is None and shape[1] == steps

    def new_stats(self, feeds: dict[str, np.ndarray[Any, Any]], first: dict[str, np.ndarray[Any, Any]]
                  ) -> dict[str, TensorStats]:
        steps = feeds[self.seq_input].shape[1] if self.seq_input else None
        n = next(iter(feeds.values())).shape[0]
        out = {}
        for t in self.infos:
            a, r = self.tol.for_tensor(t.name)
            if t.kind == "output":
                self.batch_axis[t.name] = self._find_batch_axis(t.name, first[t.name].shape, n)
            shape = self.to_batch_major(t.name, first[t.name]).shape
            timed = t.kind == "hidden_sequence" or (
                t.kind == "output" and self._timed_output(t.name, shape, steps))
            out[t.name] = TensorStats(a, r, timed, t.name in self.class_names)
        return out

    def run_set(self, rec: Recording, onnx_runner: Any, src_runner: Any, batch: int,
                progress: Progress, check: list[bool]) -> _SetResult:
        return self.run_batches(rec, rec.batches(batch), onnx_runner, src_runner, progress, check)

    def run_batches(self, rec: Recording, batches: Iterable[tuple[int, dict[str, np.ndarray[Any, Any]]]],
                    onnx_runner: Any, src_runner: Any, progress: Progress, check: list[bool]) -> _SetResult:
        """Compare ``batches`` of ``rec`` (any run of its windows); batch k+1's inference overlaps
        batch k's comparison (``seqgate.verify.pipeline``)."""
        from seqgate.verify.pipeline import inferred_batches

        stats: dict[str, TensorStats] = {}
        worst: list[tuple[float, int, dict[str, np.ndarray[Any, Any]]]] = []

        def first(model_feeds: dict[str, np.ndarray[Any, Any]], got: dict[str, Any]) -> None:
            check[0] = False
            _self_check(src_runner, model_feeds, got)

        pipeline = inferred_batches(batches, onnx_runner, src_runner, self.specs, first if check[0] else None)
        for start, feeds, model_feeds, a, s in pipeline:
            if not stats:
                stats = self.new_stats(feeds, s)
            score = np.zeros(next(iter(feeds.values())).shape[0])
            for t in self.infos:
                _check_shapes(t, a[t.name], s[t.name], self.where)
                st = stats[t.name]
                st.update(self.to_batch_major(t.name, a[t.name]), self.to_batch_major(t.name, s[t.name]), start)
                if st.window_max is not None:
                    score = np.maximum(score, st.window_max)
            _keep_worst(worst, score, start, model_feeds)
            progress.advance(len(score), rec.label)
        for st in stats.values():
            st.release()
        return _SetResult(rec, stats, worst)


def _self_check(runner: Any, feeds: dict[str, np.ndarray[Any, Any]], got: dict[str, Any]) -> None:
    check = getattr(runner, "self_check", None)
    if check is None:
        return
    d = check(feeds, got)
    if d > runner.self_check_atol:
        raise UnsupportedModelError("the source model", [Unsupported(
            "state capture", f"re-executing the model to read its states changes its outputs (max |Δ| {d:.3g})",
            "run with --no-states to compare outputs only, and report this model to the seqgate developers")])


def _check_shapes(t: TensorInfo, a: np.ndarray[Any, Any], s: np.ndarray[Any, Any],
                  where: tuple[str, str]) -> None:
    """A tensor shaped differently on the two sides: the file does not fit the source (exit 2)."""
    if a.shape != s.shape:
        from seqgate.verify.interface import shape_error

        raise shape_error(t.name, a.shape, s.shape, *where)


def _keep_worst(worst: list[Any], score: np.ndarray[Any, Any], start: int, feeds: dict[str, Any]) -> None:
    for i in np.argsort(-score)[:WORST_KEPT]:
        item = (float(score[i]), -(start + int(i)), {k: v[i:i + 1].copy() for k, v in feeds.items()})
        if len(worst) < WORST_KEPT:
            heapq.heappush(worst, item)  # type: ignore[misc]
        elif item[0] > worst[0][0]:
            heapq.heapreplace(worst, item)  # type: ignore[misc]


# ----- report --------------------------------------------------------------------------------
def _tensor_entry(t: TensorInfo, results: list[_SetResult], batch_axis: int) -> dict[str, Any]:
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


def _first_divergence(infos: list[TensorInfo], results: list[_SetResult]) -> dict[str, Any] | None:
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
) -> VerifyReport:
    """Compare the ONNX file with its source on every window; see the module docstring.

    Settings go through the parsers of ``seqgate.settings``; ``tolerances`` is a tolerance file
    (``atol``/``rtol`` on top of it) or a :class:`Tolerances` value (``atol``/``rtol`` ignored).
    """
    from seqgate.onnxfile.load import load_onnx
    from seqgate.util.environment import environment

    opts, tol = _settings(locals())
    synthetic, batch_size, states, oracle, task, seed = (
        opts[k] for k in ("synthetic", "batch_size", "states", "oracle", "task", "seed"))
    windows = list(recordings)
    if not windows and not synthetic:
        raise BadInputError("nothing to compare: give recorded windows with --recording REC.npz and/or "
                            "--synthetic.")
    if isinstance(tolerances, Tolerances):  # built by a caller (the gate config), not read from a file
        tolerances = None
    path = Path(model_path)
    model = load_onnx(path)
    src = source if isinstance(source, Source) else parse_source(source, weights)
    prov, probes, warnings = _check_source(model, src, states)
    specs = input_specs(model)
    recs = _window_sets(model, specs, windows, synthetic, batch_size, seed)
    infos = tensor_infos(model, probes)
    warnings += [f"tolerance pattern {p!r} matches no tensor" for p in tol.unmatched([t.name for t in infos])]
    onnx_runner, src_runner = _runners(model, src, probes, states, recs, specs, str(path))
    comparer = Comparer(infos, tol, _classes(model, task), specs, output_dims(model))
    comparer.where = (str(path), src.text)
    results = _run_all(comparer, recs, onnx_runner, src_runner, batch_size, progress or SILENT)
    oracle_out = None
    if oracle:
        from seqgate.verify.oracle import run_oracle

        oracle_out = run_oracle(model, probes, infos, results, onnx_runner, src_runner, tol)
    first = _first_divergence(infos, results)
    return VerifyReport(
        passed=first is None,
        tensors=[_tensor_entry(t, results, comparer.batch_axis.get(t.name, 0)) for t in infos],
        first_divergence=first, recordings=[r.recording.to_json() for r in results],
        model=_model_record(path, specs), source=_source_record(src), seed=seed,
        settings={**{k: opts[k] for k in ("batch_size", "states", "synthetic", "task", "oracle")},
                  "atol": tol.atol, "rtol": tol.rtol, "tolerances_file": tolerances,
                  "tolerance": [o.to_json() for o in tol.overrides]},
        environment=environment(), oracle=oracle_out, warnings=warnings, provenance=prov)


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
    from seqgate.verify.synthetic import read_padding, synthetic_sets

    recs = [load_recording(w, specs) for w in windows]
    if synthetic:
        stats = feature_stats(recs[0], batch_size) if recs else None
        recs += synthetic_sets(specs, stats, seed, padding=read_padding(model))
    return recs


def _runners(model: Any, src: Source, probes: list[Probe], states: bool, recs: list[Recording],
             specs: list[InputSpec], label: str) -> tuple[Any, Any]:
    """ONNX Runtime's runner and the source framework's, after checking the file fits the source."""
    from seqgate.runtimes.factory import load_source_model, open_source_runner
    from seqgate.runtimes.onnx import OnnxRunner
    from seqgate.verify.pipeline import thread_plan

    plan = thread_plan()  # the two runtimes run side by side (seqgate.verify.pipeline)
    onnx_runner = OnnxRunner(model, probes, threads=plan.onnx)
    loaded = load_source_model(src, plan.source)
    _check_interface(model, src, loaded, recs, specs, onnx_runner, label)
    output_names = [o.name for o in model.graph.output]
    src_runner = open_source_runner(src, probes, output_names, states, loaded=loaded)
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
    raw = {k: args[k] for k in ("synthetic", "seed", "batch_size", "states", "task", "oracle")}
    opts = parse_settings("verify", {**raw, "task": raw["task"] or d.TASK}, PYTHON, problems)
    tol = args["tolerances"]
    if not isinstance(tol, Tolerances):
        tol = read_tolerances(tol, args["atol"], args["rtol"], problems, "argument atol", "argument rtol")
    problems.raise_if_any()
    return opts, tol


def _run_all(comparer: Comparer, recs: list[Recording], onnx_runner: Any, src_runner: Any, batch: int,
             progress: Progress) -> list[_SetResult]:
    check = [True]
    progress.start(f"verifying {len(recs)} window set{'s' if len(recs) != 1 else ''}",
                   sum(r.windows for r in recs))
    results = [comparer.run_set(r, onnx_runner, src_runner, batch, progress, check) for r in recs]
    progress.finish()
    return results
