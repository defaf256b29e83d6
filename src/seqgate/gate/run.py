"""``seqgate gate``: export → verify → profile from one config file, one verdict, one report.

Python API::

    import seqgate
    report = seqgate.gate("fixtures/demo/pressure/gate.toml", out="out/pressure")
    print(report.passed, report.exit_code, report.out_dir / "report.html")

Contract:
- The config is validated in full before any heavy work (``seqgate.gate_config``): every
  problem in one message, exit 2.
- Export writes ``model.onnx`` into the output directory; an unsupported model stops the gate
  with exit 3, and the reports still record why. With ``[model] onnx = FILE`` the gate checks
  that file (the artifact that ships) against the source instead of exporting a new one.
- Budgets at lengths the exported model cannot take (a fixed time dim) are refused (exit 2)
  before verification and profiling start.
- Checks: ``export``, ``provenance`` (the source, weights and custom-code files are those the ONNX file records,
  ``seqgate.verify.provenance``; a difference fails unless ``[model] expect_other_source`` gives
  the reason), ``verify`` (every output and hidden state within tolerance on every recording) and,
  when the config has a ``[profile]`` table, ``latency`` (every budget holds).
  The gate passes only when every check that ran passed (exit 0); otherwise exit 1.
- Variants (``[[variants]]``, ``seqgate.variants.step``): after ``verify``, each listed
  reduced-precision kind is made and verified under its own rule, timed in the same profile
  sweep, and written as ``model.<kind>.onnx`` when accepted; the fastest accepted one is marked.
  The ``variants`` check fails only for a rejected variant the config marks ``required``.
- Outputs, each written atomically: ``model.onnx``, ``report.json`` (``seqgate.gate/1``, embedding
  the verify and profile reports), ``report.md``, ``junit.xml``, ``report.html`` (self-contained).
"""

from __future__ import annotations

import datetime as _dt
import json
import signal
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from seqgate.errors import (
    EXIT_CHECK_FAILED,
    EXIT_PASSED,
    BadInputError,
    InterruptedRun,
    OutputPathError,
    SeqgateError,
)
from seqgate.gate.config import GateConfig, load_gate_config
from seqgate.util.files import check_output_dir
from seqgate.util.progress import SILENT, Progress
from seqgate.util.text import first_line

SCHEMA = "seqgate.gate/1"


@dataclass
class GateReport:
    """The gate's verdict and everything it embeds; ``to_dict()`` is ``report.json``."""

    config: GateConfig
    out_dir: Path
    checks: list[dict[str, Any]] = field(default_factory=list)
    verify: dict[str, Any] | None = None
    profile: dict[str, Any] | None = None
    error: dict[str, Any] | None = None
    files: dict[str, str] = field(default_factory=dict)
    model_name: str = ""
    build_dir: Path | None = None  # where the run writes; becomes out_dir at the end
    variants: list[dict[str, Any]] | None = None  # one entry per [[variants]] rule (seqgate.variants.step)
    stage: str = "export"  # the step running now; names the failed check when a step raises

    @property
    def passed(self) -> bool:
        return self.error is None and bool(self.checks) and all(c["passed"] for c in self.checks)

    @property
    def exit_code(self) -> int:
        if self.error is not None:
            return int(self.error["exit_code"])
        return EXIT_PASSED if self.passed else EXIT_CHECK_FAILED

    @property
    def work_dir(self) -> Path:
        return self.build_dir if self.build_dir is not None else self.out_dir

    def to_dict(self) -> dict[str, Any]:
        """``report.json``; paths inside the private build folder are given as their final place."""
        return _relocated(self._dict(), self.work_dir, self.out_dir)

    def _dict(self) -> dict[str, Any]:
        from seqgate import __version__
        from seqgate.util.environment import environment

        cfg = self.config
        return {
            "schema": SCHEMA,
            "seqgate_version": __version__,
            "created": _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
            "passed": self.passed,
            "exit_code": self.exit_code,
            "model_name": self.model_name,
            "config_path": str(cfg.path),
            "config": {"source": cfg.source, "opset": cfg.opset, "percentile": cfg.percentile,
                       "budgets": [b.to_json() for b in cfg.budgets]},
            "checks": self.checks,
            "error": self.error,
            "verify": self.verify,
            "profile": self.profile,
            "variants": self.variants,
            "provenance": {"files": self.files,
                           "model_sha256": self.files.get(str(self.work_dir / "model.onnx"))},
            "untrained": any(c.get("untrained") for c in self.checks),
            "environment": environment(),
        }


def _relocated(value: Any, old: Path, new: Path) -> Any:
    """Every string path under ``old`` rewritten under ``new`` (dict keys included)."""
    if old == new:
        return value
    a, b = str(old), str(new)
    if isinstance(value, dict):
        return {_relocated(k, old, new): _relocated(v, old, new) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return type(value)(_relocated(v, old, new) for v in value)
    if isinstance(value, str) and value.startswith(a):
        return b + value[len(a):]
    return value


def run_gate(config: str | Path, out: str | Path | None = None, progress: Progress | None = None) -> GateReport:
    """Run the whole gate (see the module docstring); reports are written even when a check fails.

    Outputs are built in a private folder and replace ``out`` in one step at the end, under a
    lock on ``out`` (``seqgate.gate.outdir``); a run that does not finish changes nothing there.
    ``progress`` receives one stage per step (exporting, verifying N window sets, profiling K
    points); see ``seqgate.util.progress``.
    """
    from seqgate.gate import outdir

    progress = progress or SILENT
    cfg = load_gate_config(config)
    out_dir = Path(out) if out is not None else cfg.base / f"{cfg.path.stem}-report"
    check_output_dir(out_dir.parent, "folder of the gate output")  # the run builds beside out_dir
    with outdir.folder_lock(out_dir, cfg.path), _InterruptWatch() as watch:
        outdir.check_replaceable(out_dir)
        outdir.clear_stale(out_dir)
        build = outdir.make_build_dir(out_dir)
        try:
            report = _run_into(cfg, out_dir, build, progress)
            watch.raising = False  # from here on a signal is noted, never raised mid-swap
            if watch.seen:
                raise KeyboardInterrupt
            outdir.commit(build, out_dir)
            report.build_dir = None
        except BaseException as e:
            outdir.discard(build)
            # A signal can surface as another exception (an import interrupted mid-way raises
            # ImportError; a wrapped one may become a SeqgateError): the flag decides.
            if watch.seen or isinstance(e, KeyboardInterrupt):
                raise InterruptedRun(f"interrupted; nothing written to {out_dir} (what it held before "
                                     f"is unchanged).") from None
            if isinstance(e, OSError | OutputPathError):
                reason = str(e) if isinstance(e, OutputPathError) else f"{e.strerror or e} at {e.filename}"
                raise BadInputError(f"the gate could not write its outputs ({reason}); nothing was written "
                                    f"to {out_dir}. Free space or choose another folder with --out-dir.") from e
            raise
    return report


def _run_into(cfg: GateConfig, out_dir: Path, build: Path, progress: Progress) -> GateReport:
    report = GateReport(cfg, out_dir, model_name=Path(cfg.source.split(":")[0]).stem, build_dir=build)
    report.files[str(cfg.path)] = _sha(cfg.path)
    try:
        _run_checks(report, progress)
    except SeqgateError as e:
        report.error = {"exit_code": e.exit_code, "message": str(e), "kind": type(e).__name__,
                        "stage": report.stage}
        report.checks.append({"name": report.stage, "passed": False, "detail": first_line(e)})
    write_reports(report)
    return report


class _InterruptWatch:
    """SIGINT and SIGTERM (what CI systems send on cancel) during a gate: note them, and raise
    KeyboardInterrupt while ``raising`` so long work stops at once. Main thread only."""

    def __init__(self) -> None:
        self.seen = False
        self.raising = True
        self._previous: dict[int, Any] = {}

    def _handle(self, signum: int, frame: object) -> None:
        self.seen = True
        if self.raising:
            raise KeyboardInterrupt

    def __enter__(self) -> _InterruptWatch:
        if threading.current_thread() is threading.main_thread():
            for sig in (signal.SIGINT, signal.SIGTERM):
                self._previous[sig] = signal.signal(sig, self._handle)
        return self

    def __exit__(self, *exc: object) -> None:
        for sig, handler in self._previous.items():
            signal.signal(sig, handler)


def _sha(path: Path) -> str:
    from seqgate.util.files import sha256_file

    return sha256_file(path)


def _run_checks(report: GateReport, progress: Progress) -> None:
    cfg = report.config
    model_path = report.work_dir / "model.onnx"
    weights = str(cfg.weights) if cfg.weights else None
    if cfg.custom_code is not None:  # [model] custom_code: the user's opt-in to running that file
        from seqgate.sources.keras import load_custom_code

        load_custom_code(cfg.custom_code)
    if cfg.onnx is not None:
        model = _adopt_onnx(report, model_path)
    else:
        progress.start("exporting")
        model = _export(report, model_path, weights)
        progress.finish()
    report.stage = "provenance"
    _provenance(report, model, weights)
    report.stage = "latency"
    _check_lengths(cfg, model)
    report.stage = "verify"
    _verify(report, model_path, weights, progress)
    made: dict[str, Any] = {}
    if cfg.variants:
        report.stage = "variants"
        made = _make_variants(report, model_path, weights, progress)
    if cfg.profile_enabled:
        report.stage = "latency"
        _profile(report, model_path, weights, progress, made)
    if cfg.variants and report.variants is not None:
        from seqgate.variants.step import conclude

        report.checks.append(conclude(report.variants, report.profile))


def _make_variants(report: GateReport, model_path: Path, weights: str | None,
                   progress: Progress) -> dict[str, Any]:
    from seqgate.variants.step import make_and_verify

    cfg = report.config
    options = {"source": cfg.source, "weights": weights, "recordings": [str(p) for p in cfg.recordings],
               "synthetic": cfg.synthetic, "batch_size": cfg.batch_size, "states": cfg.states,
               "task": cfg.task, "seed": cfg.seed, "custom_code": cfg.custom_code}
    report.variants, made = make_and_verify(cfg.variants, model_path, options, progress)
    return made


def _export(report: GateReport, model_path: Path, weights: str | None) -> Any:
    from seqgate.export.run import export_source

    cfg = report.config
    options = {"inputs": list(cfg.inputs)} if cfg.inputs else {}
    res = export_source(cfg.source, model_path, cfg.opset, force=True, weights=weights, untrained=cfg.untrained,
                        streaming=cfg.streaming, custom_code=cfg.custom_code, **options)
    from seqgate.onnxfile.probes import read_metadata

    meta = read_metadata(res.model)
    hashed = ((res.source.path, "seqgate.source.sha256"), (res.source.weights, "seqgate.source.weights_sha256"),
              (res.source.custom_code, "seqgate.source.custom_code_sha256"))
    for f, key in hashed:
        if f is not None and key in meta:  # hashed once, by the export
            report.files[str(f)] = meta[key]
    report.files[str(model_path)] = _sha(model_path)
    report.checks.append({"name": "export", "passed": True,
                          "detail": f"{len(res.model.graph.node)} ONNX nodes, {res.probes} probes, "
                                    f"opset {res.opset}"})
    return res.model


def _adopt_onnx(report: GateReport, model_path: Path) -> Any:
    """Gate a given ONNX file (the artifact that ships) instead of exporting: copy it into the output dir."""
    from seqgate.onnxfile.load import load_onnx
    from seqgate.onnxfile.probes import read_probe_map
    from seqgate.util.files import write_atomic

    cfg = report.config
    assert cfg.onnx is not None
    model = load_onnx(cfg.onnx)
    write_atomic(model_path, cfg.onnx.read_bytes())
    report.files[str(cfg.onnx)] = _sha(cfg.onnx)
    report.checks.append({"name": "export", "passed": True,
                          "detail": f"given ONNX file {cfg.onnx.name} (not exported here): "
                                    f"{len(model.graph.node)} nodes, {len(read_probe_map(model))} probes"})
    return model


def _provenance(report: GateReport, model: Any, weights: str | None) -> None:
    from seqgate.verify.provenance import provenance_check

    cfg = report.config
    report.checks.append(provenance_check(model, cfg.source, weights, cfg.expect_other_source, cfg.custom_code))


def _check_lengths(cfg: GateConfig, model: Any) -> None:
    """Refuse budgets a fixed-time model cannot take, by the profiler's own rule, before any measuring."""
    if cfg.profile_enabled:
        from seqgate.profile.run import lengths_to_measure

        lengths_to_measure(model, cfg.seq_lens, cfg.budgets, cfg.batch_sizes)


def _verify(report: GateReport, model_path: Path, weights: str | None, progress: Progress) -> None:
    from seqgate.verify.run import verify_model

    cfg = report.config
    vr = verify_model(
        model_path, cfg.source, weights=weights, recordings=[str(p) for p in cfg.recordings],
        synthetic=cfg.synthetic, tolerances=cfg.tolerances, batch_size=cfg.batch_size, states=cfg.states,
        oracle=cfg.oracle, progress=progress, task=cfg.task, seed=cfg.seed, chunk=cfg.chunk,
        workers=cfg.workers, cluster=cfg.cluster, custom_code=cfg.custom_code,
        long_stream_factor=cfg.long_stream_factor,
    )
    report.verify = vr.to_json()
    for r in report.verify["recordings"]:  # hashed once, by verify
        if r.get("path"):
            report.files[r["path"]] = r["sha256"]
    report.checks.append({"name": "verify", "passed": vr.passed, "detail": vr.headline()})
    if vr.streaming is not None:
        from seqgate.report.streaming import streaming_check_entry

        report.checks.append(streaming_check_entry(vr.streaming))
    if vr.long_stream is not None:
        from seqgate.report.long_stream import long_stream_check_entry

        report.checks.append(long_stream_check_entry(vr.long_stream))


def _profile(report: GateReport, model_path: Path, weights: str | None, progress: Progress,
             variants: dict[str, Any] | None = None) -> None:
    cfg = report.config
    pr = _measure(cfg, model_path, weights, progress, variants)
    report.profile = pr.to_dict()
    budgets = report.profile.get("budgets") or []
    missed = [b for b in budgets if not b["passed"]]
    if not budgets:
        detail = "no budget declared; latency measured only"
    elif missed:
        detail = "; ".join(f"T={b['seq_len']} batch {b['batch']} threads {b['threads']}: "
                           f"{b['measured_ms']:.3g} ms > {b['budget_ms']:g} ms" for b in missed)
    else:
        n = len(cfg.budgets)
        detail = (f"{n} budget{'s' if n != 1 else ''} held at p{cfg.percentile} at every batch and thread "
                  f"setting measured ({len(budgets)} verdicts)")
    calls = (report.profile.get("streaming") or {}).get("call_budgets") or []
    if calls:
        per_call = "per call: " + "; ".join(
            f"{c['chunk']} steps ≤ {c['budget_ms']:g} ms: {c['measured_ms']:.3g} ms "
            f"({'pass' if c['passed'] else 'fail'})" for c in calls)
        detail = per_call if not budgets else f"{detail}; {per_call}"
    report.checks.append({"name": "latency", "passed": pr.passed, "detail": detail})


def _measure(cfg: GateConfig, model_path: Path, weights: str | None, progress: Progress,
             variants: dict[str, Any] | None = None) -> Any:
    from seqgate.profile.run import profile_model

    return profile_model(
        model_path, seq_lens=cfg.seq_lens, batch_sizes=cfg.batch_sizes, threads=cfg.threads, warmup=cfg.warmup,
        min_runs=cfg.min_runs, min_time=cfg.min_time, budgets=cfg.budgets, percentile=cfg.percentile,
        source=cfg.source if cfg.compare_source else None,
        weights=weights if cfg.compare_source else None, seed=cfg.seed, progress=progress, variants=variants,
        chunks=cfg.chunks, call_budgets=cfg.call_budgets, lengths=cfg.lengths,
        custom_code=cfg.custom_code if cfg.compare_source else None,
    )


def write_reports(report: GateReport) -> None:
    """Write report.json, report.md, junit.xml and report.html atomically into the output dir."""
    from seqgate.report.gate_html import render_gate_html
    from seqgate.report.gate_text import gate_junit, gate_markdown
    from seqgate.report.verify_json import strict_json
    from seqgate.util.files import write_atomic, write_text_atomic

    d = report.to_dict()
    out = report.work_dir
    write_text_atomic(out / "report.json", json.dumps(strict_json(d), indent=2, sort_keys=True) + "\n")
    write_text_atomic(out / "report.md", gate_markdown(d))
    write_atomic(out / "junit.xml", gate_junit(d))
    write_text_atomic(out / "report.html", render_gate_html(d))
