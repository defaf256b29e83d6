"""The release-gate config file (TOML) and its validation.

Layout (every key; ``fixtures/gate_example.toml`` is the commented reference and shows every
default)::

    [model]
    source = "forecaster.keras"        # Keras file, or "FILE.py:FACTORY" for PyTorch
    weights = "model.pt"               # PyTorch state dict (PyTorch sources only)
    inputs = ["x:batch,time,3"]        # PyTorch inputs as --input takes them (optional)
    onnx = "shipped.onnx"              # gate this ONNX file instead of exporting one (optional)
    untrained = false                  # PyTorch without weights on purpose (shown in every report)
    expect_other_source = "reason"     # the ONNX file is known not to come from these files: why
    custom_code = "cells.py"           # Keras: run this file to register custom classes (opt-in)

    [export]
    opset = 17
    streaming = true                   # state inputs/outputs per recurrent layer (default: stateful Keras only)

    [verify]                           # keys, defaults and parsers: seqgate.settings.table
    recordings = ["windows.npz"]       # paths relative to this file
    synthetic = false
    seed = 0
    batch_size = 64
    states = true
    task = "auto"
    atol = 1e-4
    rtol = 1e-4
    oracle = false
    workers = 0                        # Ray workers (0: in-process)
    cluster = ""                       # running Ray cluster HOST:PORT ("" : local Ray when workers > 0)

    [[verify.tolerance]]               # per-tensor override; later matches win per field
    match = "head*"
    atol = 2e-4

    [profile]
    seq_lens = [16, 64, 256]
    batch_sizes = [1]
    threads = [1]
    percentile = 99
    warmup = 10
    min_runs = 100
    min_time = 1.0
    compare_source = true

    [[profile.budget]]
    seq_len = 64
    ms = 5.0

    [[variants]]                       # reduced-precision candidates: seqgate.settings.variants
    kind = "int8_dynamic"              # int8_dynamic | int8_dynamic_scan | int8_static | float16
    min_top1_agreement = 0.999         # and/or atol, rtol, max_label_flips, max_forecast_error_increase
    required = false                   # true: a rejected variant fails the gate

Validation happens before any heavy work and reports every problem in one message (exit 2):
unknown keys (with a did-you-mean), wrong types, out-of-range or non-finite values, tolerance
entries without ``match``, budgets without ``ms``, negative seeds, missing files, and a sweep
whose inputs alone would not fit in memory (estimated with one feature per step; the profiler
checks again with the model's real feature count). Budgets for lengths the exported model
cannot take are checked right after export, before verification and profiling start.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from seqgate.errors import BadInputError
from seqgate.settings import CONFIG, SETTINGS, Budget, Problems, Tolerances, check_input_memory, parse_settings
from seqgate.settings import defaults as d
from seqgate.settings.values import parse_int, problems_message, read_toml, unknown_key
from seqgate.settings.variants import VariantRule, parse_variants

MODEL_KEYS = ("source", "weights", "inputs", "onnx", "untrained", "expect_other_source", "custom_code")
EXPORT_KEYS = ("opset", "streaming")
SECTIONS = ("model", "export", "verify", "profile")
LISTS = ("variants",)  # top-level arrays of tables
RENAMED = {("profile", "batch"): "batch_sizes"}  # old spellings, named in the error


@dataclass(frozen=True)
class GateConfig:
    """A validated gate config; paths are resolved against the config file's directory."""

    path: Path
    source: str
    weights: Path | None
    inputs: tuple[str, ...]
    opset: int
    recordings: tuple[Path, ...]
    synthetic: bool
    seed: int
    batch_size: int
    states: bool
    task: str
    oracle: bool
    tolerances: Tolerances
    seq_lens: tuple[int, ...]
    batch_sizes: tuple[int, ...]
    threads: tuple[int, ...]
    percentile: int
    warmup: int
    min_runs: int
    min_time: float
    compare_source: bool
    budgets: tuple[Budget, ...] = field(default_factory=tuple)
    profile_enabled: bool = True
    onnx: Path | None = None
    untrained: bool = False
    expect_other_source: str | None = None  # the reason the ONNX file may come from other files
    custom_code: Path | None = None  # Keras: the user's file of custom classes, run only when named
    streaming: bool | None = None  # [export] streaming; None: only for Keras stateful layers
    chunk: int = d.CHUNK  # [verify] chunk
    long_stream_factor: int = d.LONG_STREAM_FACTOR  # [verify] long_stream_factor (streaming files)
    chunks: tuple[int, ...] = d.CHUNKS  # [profile] chunks (streaming files)
    call_budgets: tuple[Budget, ...] = ()  # [[profile.call_budget]] (streaming files)
    lengths: str | Path = "full"  # [profile] lengths: "full", "uniform" or a recording (resolved)
    variants: tuple[VariantRule, ...] = ()  # [[variants]]: reduced-precision candidates and their rules
    workers: int = 0  # [verify] workers: Ray workers, 0 = in-process
    cluster: str = ""  # [verify] cluster: a running Ray cluster's address

    @property
    def base(self) -> Path:
        return self.path.parent


def section_keys(name: str) -> tuple[str, ...]:
    """Every key the config accepts in ``[name]``."""
    if name == "model":
        return MODEL_KEYS
    if name == "export":
        return EXPORT_KEYS
    return tuple(s.key for s in SETTINGS if s.section == name)


def _table(data: dict[str, Any], name: str, problems: Problems) -> dict[str, Any]:
    raw = data.get(name, {})
    if not isinstance(raw, dict):
        problems.add(f"[{name}] must be a table")
        return {}
    known = section_keys(name)
    out: dict[str, Any] = {}
    for key, value in raw.items():
        if (name, key) in RENAMED:
            problems.add(f"[{name}] {key} is now called {RENAMED[(name, key)]}; rename it")
        elif key not in known:
            problems.add(unknown_key(key, known, f"in [{name}]: "))
        else:
            out[key] = value
    return out


def load_gate_config(path: str | Path) -> GateConfig:
    """Read and validate a gate config; raise BadInputError listing every problem."""
    p = Path(path)
    if not p.is_file():
        raise BadInputError(f"gate config {p} does not exist (or is not a file).")
    data = read_toml(p, "gate config")
    problems = Problems()
    for key in data:
        if key not in SECTIONS and key not in LISTS:
            problems.add(unknown_key(key, SECTIONS + LISTS, "section "))
    model, export, verify, profile = (_table(data, s, problems) for s in SECTIONS)
    cfg = _assemble(problems, p, "profile" in data, model, export, verify, profile)
    variants = problems.take(parse_variants, data.get("variants", []), "[[variants]]")
    if variants:
        cfg = dataclasses.replace(cfg, variants=variants)
    if problems.items:
        raise BadInputError(problems_message(f"gate config {p}", problems.items))
    return cfg


def _assemble(c: Problems, p: Path, profile_enabled: bool, model: dict[str, Any], export: dict[str, Any],
              verify_raw: dict[str, Any], profile_raw: dict[str, Any]) -> GateConfig:
    from seqgate.export.run import DEFAULT_OPSET, MAX_OPSET, MIN_OPSET

    files = _Files(p, c)
    source = _model_source(files, model.get("source"))
    weights = files.path(model["weights"], "[model] weights") if "weights" in model else None
    inputs = model.get("inputs", [])
    if not isinstance(inputs, list) or not all(isinstance(s, str) for s in inputs):
        c.add("[model] inputs must be a list of strings NAME:DIM,DIM,...")
        inputs = []
    opset = c.take(parse_int, export.get("opset", DEFAULT_OPSET), "[export] opset", MIN_OPSET, MAX_OPSET)
    v = parse_settings("verify", verify_raw, CONFIG, c)
    pr = parse_settings("profile", profile_raw, CONFIG, c)
    recordings = v["recordings"]
    if not isinstance(recordings, list | tuple) or not all(isinstance(r, str) for r in recordings):
        c.add(f"[verify] recordings must be a list of file paths, got {recordings!r}")
        recordings = []
    rec_paths = tuple(files.path(r, "[verify] recording") for r in recordings)
    if not rec_paths and not v["synthetic"]:
        c.add("[verify] needs recordings, or synthetic = true, or both")
    if profile_enabled:
        _check_sweep_memory(c, pr)
    return GateConfig(
        path=p, source=source, weights=weights, inputs=tuple(inputs), opset=opset or DEFAULT_OPSET,
        recordings=rec_paths, synthetic=v["synthetic"], seed=v["seed"], batch_size=v["batch_size"],
        states=v["states"], task=v["task"], oracle=v["oracle"],
        tolerances=Tolerances(v["atol"], v["rtol"], tuple(v["tolerance"])),
        seq_lens=tuple(pr["seq_lens"]), batch_sizes=tuple(pr["batch_sizes"]), threads=tuple(pr["threads"]),
        percentile=pr["percentile"], warmup=pr["warmup"], min_runs=pr["min_runs"], min_time=pr["min_time"],
        compare_source=pr["compare_source"], budgets=tuple(pr["budget"]), profile_enabled=profile_enabled,
        onnx=files.path(model["onnx"], "[model] onnx") if "onnx" in model else None,
        untrained=_untrained(c, model), expect_other_source=_other_source(c, model),
        custom_code=files.path(model["custom_code"], "[model] custom_code") if "custom_code" in model else None,
        streaming=_streaming(c, export), chunk=v["chunk"], long_stream_factor=v["long_stream_factor"],
        chunks=tuple(pr["chunks"]),
        call_budgets=tuple(pr["call_budget"]),
        lengths=files.path(str(pr["lengths"]), "[profile] lengths") if isinstance(pr["lengths"], Path)
        else pr["lengths"],
        workers=v["workers"], cluster=v["cluster"],
    )


def _streaming(c: Problems, export: dict[str, Any]) -> bool | None:
    """``[export] streaming``: a boolean; absent = stream only Keras ``stateful=True`` models."""
    value = export.get("streaming")
    if value is not None and not isinstance(value, bool):
        c.add(f"[export] streaming must be true or false, got {value!r}")
        return None
    return value


def _check_sweep_memory(c: Problems, pr: dict[str, Any]) -> None:
    """The longest length (budgets included) at the largest batch, one feature per step: a lower bound."""
    longest = max([*pr["seq_lens"], *(b.seq_len for b in pr["budget"])])
    c.take(lambda _v, w: check_input_memory(max(pr["batch_sizes"]), longest, 1, w), None,
           "[profile] seq_lens")


def _untrained(c: Problems, model: dict[str, Any]) -> bool:
    """``[model] untrained``: a boolean, and not together with ``weights``."""
    value = model.get("untrained", False)
    if not isinstance(value, bool):
        c.add(f"[model] untrained must be true or false, got {value!r}")
        return False
    if value and model.get("weights"):
        c.add("[model] untrained = true and weights contradict each other; drop one")
    return value


def _other_source(c: Problems, model: dict[str, Any]) -> str | None:
    """``[model] expect_other_source``: the reason, a non-empty string."""
    reason = model.get("expect_other_source")
    if reason is None:
        return None
    if not isinstance(reason, str) or not reason.strip():
        c.add("[model] expect_other_source needs the reason as its value, e.g. expect_other_source = "
              "\"shipped file predates the rename of the source; weights unchanged\"")
        return None
    return reason.strip()


class _Files:
    """Paths in the config, resolved against its directory; a missing file is a problem."""

    def __init__(self, config: Path, problems: Problems) -> None:
        self.base, self.problems = config.parent, problems

    def path(self, text: Any, what: str) -> Path:
        if not isinstance(text, str) or not text:
            self.problems.add(f"{what} must be a file path (a string), got {text!r}")
            return self.base
        p = Path(text)
        p = p if p.is_absolute() else (self.base / p)
        if not p.is_file():
            self.problems.add(f"{what} {text!r} does not exist (looked at {p})")
        return p


def _model_source(files: _Files, source: Any) -> str:
    """Resolve the file part of a source against the config's directory; check it exists."""
    if not source:
        files.problems.add("[model] source is required (a Keras file or FILE.py:FACTORY)")
        return ""
    if not isinstance(source, str):
        files.problems.add(f"[model] source must be a string, got {source!r}")
        return ""
    if ":" in source and not source.lower().endswith((".keras", ".h5", ".hdf5")):
        mod, _, factory = source.rpartition(":")
        if mod.endswith(".py"):
            return f"{files.path(mod, '[model] source file')}:{factory}"
        return source
    return str(files.path(source, "[model] source"))
