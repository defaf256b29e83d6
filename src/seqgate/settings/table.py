"""The table of settings: for each one, its names (command line, config key, Python keyword, JSON
field), its default and its parser. README's "Names" table is this table (a test compares them).

:func:`parse_settings` is how every front end reads a section: the command line (``where`` =
the option), the gate config (``[verify] atol``) and the Python API (``argument atol``) pass
the raw values they received, keyed by config key; each value goes through the one parser of
its setting, and every problem lands in the caller's :class:`Problems`.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

from seqgate.settings import defaults as d
from seqgate.settings.tolerance import parse_overrides
from seqgate.settings.values import (
    Problems,
    parse_bool,
    parse_budgets,
    parse_cluster,
    parse_count,
    parse_int_list,
    parse_lengths,
    parse_percentile,
    parse_seconds,
    parse_seed,
    parse_stream_factor,
    parse_task,
    parse_tolerance,
    parse_warmup,
    parse_workers,
)

CLI, CONFIG, PYTHON = "cli", "config", "python"


@dataclass(frozen=True)
class Setting:
    """One setting and every name it goes by."""

    section: str  # "verify" | "profile"
    key: str  # config key
    cli: str | None  # command-line option (None: config only)
    json: str  # field of the JSON report (dotted path)
    default: Any
    parse: Callable[[Any, str], Any] | None  # None: read by its front end (paths)
    meaning: str
    table: bool = False  # written [[section.key]] in a config
    keyword: str | None = None  # Python keyword when it differs from the key

    def where(self, place: str) -> str:
        """The setting as the user wrote it at ``place`` (CLI, CONFIG or PYTHON)."""
        if place == CLI and self.cli:
            return self.cli
        if place == PYTHON:
            return f"argument {self.keyword or self.key}"
        return f"[[{self.section}.{self.key}]]" if self.table else f"[{self.section}] {self.key}"


SETTINGS: tuple[Setting, ...] = (
    Setting("verify", "recordings", "--recording", "recordings", (), None,
            "recorded windows (.npz/.npy); repeatable on the command line"),
    Setting("verify", "synthetic", "--synthetic", "settings.synthetic", d.SYNTHETIC, parse_bool,
            "add the five seeded synthetic recordings"),
    Setting("verify", "seed", "--seed", "seed", d.SEED, parse_seed,
            "seed of the synthetic windows and of the profile inputs"),
    Setting("verify", "batch_size", "--batch-size", "settings.batch_size", d.BATCH_SIZE, parse_count,
            "windows per runtime call"),
    Setting("verify", "states", "--states", "settings.states", d.STATES, parse_bool,
            "compare every hidden state, not only the outputs (--no-states: outputs only)"),
    Setting("verify", "task", "--task", "settings.task", d.TASK, parse_task,
            "auto | classify | regress: which outputs get top-1 agreement"),
    Setting("verify", "atol", "--atol", "settings.atol", d.ATOL, parse_tolerance,
            "absolute tolerance of every tensor"),
    Setting("verify", "rtol", "--rtol", "settings.rtol", d.RTOL, parse_tolerance,
            "relative tolerance of every tensor"),
    Setting("verify", "oracle", "--oracle", "settings.oracle", d.ORACLE, parse_bool,
            "re-run the worst windows under onnx.reference"),
    Setting("verify", "chunk", "--chunk", "streaming.chunk_sizes", d.CHUNK, parse_count,
            "streaming files: the chunk size streamed besides 1 and 7"),
    Setting("verify", "long_stream_factor", "--long-stream-factor", "long_stream.factor", d.LONG_STREAM_FACTOR,
            parse_stream_factor, "streaming files: long-stream length in window lengths (0: no long-stream "
            "check)"),
    Setting("verify", "workers", "--workers", "settings.workers", d.WORKERS, parse_workers,
            "Ray workers that share the windows (0: verify in this process)"),
    Setting("verify", "cluster", "--cluster", "settings.cluster", d.CLUSTER, parse_cluster,
            "address of a running Ray cluster HOST:PORT (\"\": start a local one when workers > 0)"),
    Setting("verify", "tolerance", None, "settings.tolerance", (), parse_overrides,
            "per-tensor overrides: match, atol, rtol ([[tolerance]] in a --tolerances file)", table=True),
    Setting("profile", "seq_lens", "--seq-lens", "options.seq_lens", d.SEQ_LENS, parse_int_list,
            "sequence lengths to time"),
    Setting("profile", "batch_sizes", "--batch-sizes", "options.batch_sizes", d.BATCH_SIZES, parse_int_list,
            "batch sizes to time"),
    Setting("profile", "threads", "--threads", "options.threads", d.THREADS, parse_int_list,
            "ONNX Runtime intra-op thread counts"),
    Setting("profile", "percentile", "--percentile", "options.percentile", d.PERCENTILE, parse_percentile,
            "the percentile budgets judge: 50, 90 or 99"),
    Setting("profile", "warmup", "--warmup", "options.warmup", d.WARMUP, parse_warmup,
            "untimed runs per point"),
    Setting("profile", "min_runs", "--min-runs", "options.min_runs", d.MIN_RUNS, parse_count,
            "timed runs per point, at least"),
    Setting("profile", "min_time", "--min-time", "options.min_time", d.MIN_TIME, parse_seconds,
            "seconds per point, at least"),
    Setting("profile", "lengths", "--lengths", "options.lengths", d.LENGTHS, parse_lengths,
            "rows of a timed batch: full, or also padded (uniform in 1..T, or a recording's lengths)"),
    Setting("profile", "compare_source", None, "source", d.COMPARE_SOURCE, parse_bool,
            "also time the source framework (on the command line: give --source)"),
    Setting("profile", "budget", "--budget", "options.budgets", (), parse_budgets,
            "latency budgets: seq_len and ms (T=MS on the command line)", table=True, keyword="budgets"),
    Setting("profile", "chunks", "--chunks", "streaming.chunks", d.CHUNKS, parse_int_list,
            "streaming files: steps per call to time"),
    Setting("profile", "call_budget", "--call-budget", "streaming.call_budgets", (), parse_budgets,
            "streaming files: per-call budgets, seq_len = steps per call and ms (N=MS on the command line)",
            table=True, keyword="call_budgets"),
)


def setting(section: str, key: str) -> Setting:
    return next(s for s in SETTINGS if s.section == section and s.key == key)


def parse_settings(section: str, raw: Mapping[str, Any], place: str, problems: Problems) -> dict[str, Any]:
    """Every parsed setting of ``section`` keyed by config key; absent or ``None`` → the default.

    A value that fails its parser is recorded in ``problems`` and replaced by the default, so
    the caller can go on collecting problems and raise once.
    """
    out: dict[str, Any] = {}
    for s in SETTINGS:
        if s.section != section:
            continue
        value = raw.get(s.key)
        if value is None or s.parse is None:
            out[s.key] = s.default if value is None else value
            continue
        got = problems.take(s.parse, value, s.where(place))
        out[s.key] = s.default if got is None else got
    return out
