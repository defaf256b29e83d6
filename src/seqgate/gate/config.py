"""The release-gate config file (TOML, read with ``tomllib``) and its validation.

Layout (every key; ``fixtures/gate_example.toml`` is the commented reference)::

    [model]
    source = "forecaster.keras"        # Keras file, or "FILE.py:FACTORY" for PyTorch
    weights = "model.pt"               # PyTorch state dict (PyTorch sources only)
    inputs = ["x:batch,time,3"]        # PyTorch input spec, NAME:DIM,... (optional)
    onnx = "shipped.onnx"              # gate this ONNX file instead of exporting one (optional)
    untrained = false                  # PyTorch without weights on purpose (shown in every report)
    expect_other_source = "reason"     # the ONNX file is known not to come from these files: why

    [export]
    opset = 17

    [verify]
    recordings = ["windows.npz"]       # .npz / .npy files, paths relative to this file
    synthetic = true                   # add seeded stress windows
    seed = 0
    batch_size = 64
    states = true                      # compare every hidden state, not only outputs
    task = "auto"                      # "auto" | "classify" | "regress"
    atol = 1e-4                        # defaults: seqgate.compare.DEFAULT_ATOL / DEFAULT_RTOL
    rtol = 1e-4
    oracle = false                     # third opinion from onnx.reference on the worst windows

    [[verify.tolerance]]               # per-tensor override; later matches win per field
    match = "head*"                    # fnmatch pattern on the tensor name
    atol = 1e-4
    rtol = 1e-3

    [profile]
    seq_lens = [16, 64, 256]
    batch = [1]
    threads = [1]
    percentile = 99                    # 50 | 90 | 99
    warmup = 10
    min_runs = 30
    min_time = 0.5                     # seconds per point
    compare_source = true              # also time the source framework

    [[profile.budget]]
    seq_len = 64
    ms = 5.0

Validation happens before any heavy work and reports every problem in one message (exit 2):
unknown keys (with a did-you-mean), wrong types, out-of-range values, missing files.
Budgets for lengths the exported model cannot take are checked right after export, before
verification and profiling start.
"""

from __future__ import annotations

import difflib
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from seqgate.errors import BadInputError

_SCHEMA: dict[str, dict[str, tuple[type | tuple[type, ...], Any]]] = {
    "model": {"source": (str, None), "weights": (str, None), "inputs": (list, None), "onnx": (str, None),
              "untrained": (bool, False), "expect_other_source": (str, None)},
    "export": {"opset": (int, 17)},
    "verify": {
        "recordings": (list, []), "synthetic": (bool, True), "seed": (int, 0),
        "batch_size": (int, 64), "states": (bool, True), "task": (str, "auto"),
        "atol": ((int, float), None), "rtol": ((int, float), None), "oracle": (bool, False),
        "tolerance": (list, []),
    },
    "profile": {
        "seq_lens": (list, [16, 64, 256]), "batch": (list, [1]), "threads": (list, [1]),
        "percentile": (int, 99), "warmup": (int, 10), "min_runs": (int, 30),
        "min_time": ((int, float), 0.5), "compare_source": (bool, True), "budget": (list, []),
    },
}
_TOLERANCE_KEYS = {"match": str, "atol": (int, float), "rtol": (int, float)}
_BUDGET_KEYS = {"seq_len": int, "ms": (int, float)}


@dataclass(frozen=True)
class ToleranceRule:
    match: str
    atol: float | None
    rtol: float | None


@dataclass(frozen=True)
class Budget:
    seq_len: int
    ms: float


@dataclass
class GateConfig:
    """A validated gate config; paths are resolved against the config file's directory."""

    path: Path
    source: str
    weights: Path | None
    inputs: list[str]
    opset: int
    recordings: list[Path]
    synthetic: bool
    seed: int
    batch_size: int
    states: bool
    task: str
    atol: float | None
    rtol: float | None
    oracle: bool
    tolerances: list[ToleranceRule]
    seq_lens: list[int]
    batch: list[int]
    threads: list[int]
    percentile: int
    warmup: int
    min_runs: int
    min_time: float
    compare_source: bool
    budgets: list[Budget] = field(default_factory=list)
    profile_enabled: bool = True
    onnx: Path | None = None
    untrained: bool = False
    expect_other_source: str | None = None  # the reason the ONNX file may come from other files

    @property
    def base(self) -> Path:
        return self.path.parent


def _type_name(t: type | tuple[type, ...]) -> str:
    if isinstance(t, tuple):
        return " or ".join(x.__name__ for x in t)
    return {"str": "a string", "int": "an integer", "bool": "true/false", "list": "a list"}.get(
        t.__name__, t.__name__
    )


def _is(value: Any, t: type | tuple[type, ...]) -> bool:
    if isinstance(value, bool) and t in (int, (int, float)):
        return False  # TOML true is not a number
    return isinstance(value, t)


def _unknown(key: str, known: list[str], where: str) -> str:
    close = difflib.get_close_matches(key, known, n=1)
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    return f"unknown key {where}{key!r}{hint}; known keys: {', '.join(sorted(known))}"


class _Checker:
    def __init__(self, path: Path) -> None:
        self.path = path
        self.problems: list[str] = []

    def table(self, data: dict[str, Any], name: str) -> dict[str, Any]:
        spec = _SCHEMA[name]
        raw = data.get(name, {})
        if not isinstance(raw, dict):
            self.problems.append(f"[{name}] must be a table")
            return {k: d for k, (_, d) in spec.items()}
        out: dict[str, Any] = {}
        for key, value in raw.items():
            if key not in spec:
                self.problems.append(_unknown(key, list(spec), f"in [{name}]: "))
                continue
            t, _ = spec[key]
            if not _is(value, t):
                self.problems.append(f"[{name}] {key} must be {_type_name(t)}, got {value!r}")
                continue
            out[key] = value
        for key, (_, default) in spec.items():
            out.setdefault(key, default)
        return out

    def file(self, text: str, what: str) -> Path:
        p = Path(text)
        p = p if p.is_absolute() else (self.path.parent / p)
        if not p.is_file():
            self.problems.append(f"{what} {text!r} does not exist (looked at {p})")
        return p

    def ints(self, values: list[Any], what: str, lo: int = 1) -> list[int]:
        good = [v for v in values if _is(v, int) and v >= lo]
        if len(good) != len(values) or not values:
            self.problems.append(f"{what} must be a non-empty list of integers ≥ {lo}, got {values!r}")
        return good

    def rows(self, values: list[Any], keys: dict[str, Any], what: str) -> list[dict[str, Any]]:
        out = []
        for i, row in enumerate(values):
            if not isinstance(row, dict):
                self.problems.append(f"{what} entry {i + 1} must be a table")
                continue
            ok = True
            for k, v in row.items():
                if k not in keys:
                    self.problems.append(_unknown(k, list(keys), f"in {what} entry {i + 1}: "))
                    ok = False
                elif not _is(v, keys[k]):
                    self.problems.append(f"{what} entry {i + 1}: {k} must be {_type_name(keys[k])}, got {v!r}")
                    ok = False
            out.append(row if ok else {})
        return out


def load_gate_config(path: str | Path) -> GateConfig:
    """Read and validate a gate config; raise BadInputError listing every problem."""
    p = Path(path)
    if not p.is_file():
        raise BadInputError(f"gate config {p} does not exist (or is not a file).")
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as e:
        raise BadInputError(f"gate config {p} is not valid TOML: {e}. Fix the syntax and run again.") from e
    c = _Checker(p)
    for key in data:
        if key not in _SCHEMA:
            c.problems.append(_unknown(key, list(_SCHEMA), "section "))
    model, export, verify, profile = (c.table(data, s) for s in ("model", "export", "verify", "profile"))
    cfg = _assemble(c, p, data, model, export, verify, profile)
    if c.problems:
        n = len(c.problems)
        lines = "\n".join(f"  - {x}" for x in c.problems)
        raise BadInputError(f"gate config {p} has {n} problem{'s' if n != 1 else ''}; fix them and run "
                            f"again:\n{lines}")
    return cfg


def _assemble(c: _Checker, p: Path, data: dict[str, Any], model: dict[str, Any], export: dict[str, Any],
              verify: dict[str, Any], profile: dict[str, Any]) -> GateConfig:
    from seqgate.export.run import MAX_OPSET, MIN_OPSET

    source = model.get("source")
    if not source:
        c.problems.append("[model] source is required (a Keras file or FILE.py:FACTORY)")
        source = ""
    else:
        source = _resolve_source(c, source)
    weights = c.file(model["weights"], "[model] weights") if model.get("weights") else None
    inputs = model.get("inputs") or []
    if not all(isinstance(s, str) for s in inputs):
        c.problems.append("[model] inputs must be a list of strings NAME:DIM,DIM,...")
    if not MIN_OPSET <= export["opset"] <= MAX_OPSET:
        c.problems.append(f"[export] opset must be in {MIN_OPSET}..{MAX_OPSET}, got {export['opset']}")
    recordings = [c.file(r, "[verify] recording") for r in verify["recordings"] if isinstance(r, str)]
    if len(recordings) != len(verify["recordings"]):
        c.problems.append("[verify] recordings must be a list of file paths")
    if not recordings and not verify["synthetic"]:
        c.problems.append("[verify] needs recordings, or synthetic = true, or both")
    if verify["task"] not in ("auto", "classify", "regress"):
        c.problems.append(f"[verify] task must be 'auto', 'classify' or 'regress', got {verify['task']!r}")
    if verify["batch_size"] < 1:
        c.problems.append(f"[verify] batch_size must be ≥ 1, got {verify['batch_size']}")
    for k in ("atol", "rtol"):
        if verify[k] is not None and verify[k] < 0:
            c.problems.append(f"[verify] {k} must be ≥ 0, got {verify[k]}")
    tols = [ToleranceRule(r["match"], r.get("atol"), r.get("rtol"))
            for r in c.rows(verify["tolerance"], _TOLERANCE_KEYS, "[[verify.tolerance]]") if r]
    for i, t in enumerate(tols):
        if not t.match:
            c.problems.append(f"[[verify.tolerance]] entry {i + 1} needs a match pattern")
    budgets = [Budget(int(r["seq_len"]), float(r["ms"]))
               for r in c.rows(profile["budget"], _BUDGET_KEYS, "[[profile.budget]]")
               if r and "seq_len" in r and "ms" in r]
    for b in budgets:
        if b.seq_len < 1 or b.ms <= 0:
            c.problems.append(f"[[profile.budget]] seq_len must be ≥ 1 and ms > 0, got {b}")
    if profile["percentile"] not in (50, 90, 99):
        c.problems.append(f"[profile] percentile must be 50, 90 or 99, got {profile['percentile']}")
    if profile["min_time"] < 0 or profile["min_runs"] < 1 or profile["warmup"] < 0:
        c.problems.append("[profile] warmup must be ≥ 0, min_runs ≥ 1 and min_time ≥ 0")
    return GateConfig(
        path=p, source=source, weights=weights, inputs=list(inputs), opset=export["opset"],
        recordings=recordings, synthetic=verify["synthetic"], seed=verify["seed"],
        batch_size=verify["batch_size"], states=verify["states"], task=verify["task"],
        atol=verify["atol"], rtol=verify["rtol"], oracle=verify["oracle"], tolerances=tols,
        seq_lens=c.ints(profile["seq_lens"], "[profile] seq_lens"),
        batch=c.ints(profile["batch"], "[profile] batch"),
        threads=c.ints(profile["threads"], "[profile] threads"),
        percentile=profile["percentile"], warmup=profile["warmup"], min_runs=profile["min_runs"],
        min_time=float(profile["min_time"]), compare_source=profile["compare_source"], budgets=budgets,
        profile_enabled="profile" in data,
        onnx=c.file(model["onnx"], "[model] onnx") if model.get("onnx") else None,
        untrained=model["untrained"], expect_other_source=_other_source(c, model),
    )


def _other_source(c: _Checker, model: dict[str, Any]) -> str | None:
    """``[model] expect_other_source``: a non-empty reason; ``untrained`` excludes ``weights``."""
    if model["untrained"] and model.get("weights"):
        c.problems.append("[model] untrained = true and weights contradict each other; drop one")
    reason = model.get("expect_other_source")
    if reason is not None and not reason.strip():
        c.problems.append("[model] expect_other_source needs the reason as its value, e.g. "
                          "expect_other_source = \"shipped file predates the rename of the source; "
                          "weights unchanged\"")
        return None
    return reason.strip() if reason else None


def _resolve_source(c: _Checker, source: str) -> str:
    """Resolve the file part of a source against the config's directory; check it exists."""
    if ":" in source and not source.lower().endswith((".keras", ".h5", ".hdf5")):
        mod, _, factory = source.rpartition(":")
        if mod.endswith(".py"):
            return f"{c.file(mod, '[model] source file')}:{factory}"
        return source
    return str(c.file(source, "[model] source"))
