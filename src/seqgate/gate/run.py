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
- Checks: ``export``, ``provenance`` (the source and weights files are those the ONNX file records,
  ``seqgate.verify.provenance``; a difference fails unless ``[model] expect_other_source`` gives
  the reason), ``verify`` (every output and hidden state within tolerance on every window set) and,
  when the config has a ``[profile]`` table, ``latency`` (every budget holds).
  The gate passes only when every check that ran passed (exit 0); otherwise exit 1.
- Outputs, each written atomically: ``model.onnx``, ``report.json`` (``seqgate.gate/1``, embedding
  the verify and profile reports), ``report.md``, ``junit.xml``, ``report.html`` (self-contained).
"""

from __future__ import annotations

import datetime as _dt
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from seqgate.errors import (
    EXIT_CHECK_FAILED,
    EXIT_PASSED,
    BadInputError,
    SeqgateError,
)
from seqgate.gate.config import GateConfig, load_gate_config

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
    stage: str = "export"  # the step running now; names the failed check when a step raises

    @property
    def passed(self) -> bool:
        return self.error is None and bool(self.checks) and all(c["passed"] for c in self.checks)

    @property
    def exit_code(self) -> int:
        if self.error is not None:
            return int(self.error["exit_code"])
        return EXIT_PASSED if self.passed else EXIT_CHECK_FAILED

    def to_dict(self) -> dict[str, Any]:
        from seqgate import __version__
        from seqgate.util.environment import environment

        cfg = self.config
        return {
            "schema": SCHEMA,
            "tool_version": __version__,
            "created": _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
            "passed": self.passed,
            "exit_code": self.exit_code,
            "model_name": self.model_name,
            "config_path": str(cfg.path),
            "config": {"source": cfg.source, "opset": cfg.opset, "percentile": cfg.percentile,
                       "budgets": [{"seq_len": b.seq_len, "ms": b.ms} for b in cfg.budgets]},
            "checks": self.checks,
            "error": self.error,
            "verify": self.verify,
            "profile": self.profile,
            "provenance": {"files": self.files},
            "untrained": any(c.get("untrained") for c in self.checks),
            "environment": environment(),
        }


def run_gate(config: str | Path, out: str | Path | None = None, progress: bool = False) -> GateReport:
    """Run the whole gate (see the module docstring); reports are written even when a check fails."""
    cfg = load_gate_config(config)
    out_dir = Path(out) if out is not None else cfg.base / f"{cfg.path.stem}-report"
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise BadInputError(f"cannot create the output directory {out_dir} ({e.strerror}).") from e
    report = GateReport(cfg, out_dir, model_name=Path(cfg.source.split(":")[0]).stem)
    report.files[str(cfg.path)] = _sha(cfg.path)
    try:
        _run_checks(report, progress)
    except SeqgateError as e:
        report.error = {"exit_code": e.exit_code, "message": str(e), "kind": type(e).__name__,
                        "stage": report.stage}
        report.checks.append({"name": report.stage, "passed": False, "detail": str(e).splitlines()[0]})
    write_reports(report)
    return report


def _sha(path: Path) -> str:
    from seqgate.util.files import sha256_file

    return sha256_file(path)


def _run_checks(report: GateReport, progress: bool) -> None:
    cfg = report.config
    model_path = report.out_dir / "model.onnx"
    model_path.unlink(missing_ok=True)  # a model left by an earlier run must not pass for this one's
    weights = str(cfg.weights) if cfg.weights else None
    if cfg.onnx is not None:
        model = _adopt_onnx(report, model_path)
    else:
        model = _export(report, model_path, weights)
    report.stage = "provenance"
    _provenance(report, model, weights)
    report.stage = "latency"
    _check_lengths(cfg, model)
    report.stage = "verify"
    _verify(report, model_path, weights, progress)
    if cfg.profile_enabled:
        report.stage = "latency"
        _profile(report, model_path, weights, progress)


def _export(report: GateReport, model_path: Path, weights: str | None) -> Any:
    from seqgate.export.run import export_source

    cfg = report.config
    options = {"inputs": cfg.inputs} if cfg.inputs else {}
    res = export_source(cfg.source, model_path, cfg.opset, force=True, weights=weights, untrained=cfg.untrained,
                        **options)
    from seqgate.onnxfile.probes import read_metadata

    meta = read_metadata(res.model)
    hashed = ((res.source.path, "seqgate.source.sha256"), (res.source.weights, "seqgate.source.weights_sha256"))
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
    report.checks.append(provenance_check(model, cfg.source, weights, cfg.expect_other_source))


def _check_lengths(cfg: GateConfig, model: Any) -> None:
    """Refuse budgets a fixed-time model cannot take, by the profiler's own rule, before any measuring."""
    if cfg.profile_enabled:
        from seqgate.profile.run import lengths_to_measure

        lengths_to_measure(model, cfg.seq_lens, [f"{b.seq_len}={b.ms}" for b in cfg.budgets])


def _verify(report: GateReport, model_path: Path, weights: str | None, progress: bool) -> None:
    from seqgate.verify.compare import Tolerances, load_tolerances
    from seqgate.verify.run import verify_model

    cfg = report.config
    base = load_tolerances(None, cfg.atol, cfg.rtol)
    tol = Tolerances(base.atol, base.rtol, tuple((t.match, t.atol, t.rtol) for t in cfg.tolerances))
    vr = verify_model(
        model_path, cfg.source, weights=weights, windows=[str(p) for p in cfg.recordings],
        synthetic=cfg.synthetic, tolerances=tol, batch_size=cfg.batch_size, states=cfg.states,
        oracle=cfg.oracle, progress=progress, task=None if cfg.task == "auto" else cfg.task,
        seed=cfg.seed,
    )
    report.verify = vr.to_json()
    for r in report.verify["recordings"]:  # hashed once, by verify
        if r.get("path"):
            report.files[r["path"]] = r["sha256"]
    report.checks.append({"name": "verify", "passed": vr.passed, "detail": vr.headline()})


def _profile(report: GateReport, model_path: Path, weights: str | None, progress: bool) -> None:
    cfg = report.config
    if progress:
        from seqgate.cli.profile import _progress

        with _progress() as bar:
            pr = _measure(cfg, model_path, weights, bar)
    else:
        pr = _measure(cfg, model_path, weights, None)
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
    report.checks.append({"name": "latency", "passed": pr.passed, "detail": detail})


def _measure(cfg: GateConfig, model_path: Path, weights: str | None, bar: Any) -> Any:
    from seqgate.profile.run import profile_model

    return profile_model(
        model_path, seq_lens=cfg.seq_lens, batches=cfg.batch, threads=cfg.threads, warmup=cfg.warmup,
        min_runs=cfg.min_runs, min_time=cfg.min_time,
        budgets=[f"{b.seq_len}={b.ms}" for b in cfg.budgets], percentile=cfg.percentile,
        source=cfg.source if cfg.compare_source else None,
        weights=weights if cfg.compare_source else None, seed=cfg.seed, progress=bar,
    )


def write_reports(report: GateReport) -> None:
    """Write report.json, report.md, junit.xml and report.html atomically into the output dir."""
    from seqgate.report.gate_html import render_gate_html
    from seqgate.report.gate_text import gate_junit, gate_markdown
    from seqgate.report.verify_json import strict_json
    from seqgate.util.files import write_atomic, write_text_atomic

    d = report.to_dict()
    out = report.out_dir
    write_text_atomic(out / "report.json", json.dumps(strict_json(d), indent=2, sort_keys=True) + "\n")
    write_text_atomic(out / "report.md", gate_markdown(d))
    write_atomic(out / "junit.xml", gate_junit(d))
    write_text_atomic(out / "report.html", render_gate_html(d))
