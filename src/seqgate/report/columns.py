"""The profile CSV's columns: written by ``report.profile_report``, recognised by ``util.ownership``."""

from __future__ import annotations

CSV_COLUMNS = (
    "seq_len", "batch", "threads", "runtime", "p50_ms", "p90_ms", "p99_ms", "min_ms", "max_ms",
    "mean_ms", "std_ms", "runs", "sequences_per_s", "steps_per_s", "us_per_step",
    "macs_per_sequence", "gflops", "speedup", "framework_threads", "lengths", "valid_steps",
)
