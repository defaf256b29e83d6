"""The inputs of the long-stream check (``seqgate.verify.long_stream``).

A long stream is ``factor`` (F) × the window length ``T`` steps long; each set holds ``rows``
streams, in the recording's window-first layout:

- from a recording (``long:<label>``): row j is the recorded windows ``j·F, j·F+1, …, j·F+F−1``
  joined along the time axis in recorded order (consecutive windows, as a device would see them
  when the windows were cut without overlap). A recording with fewer than ``rows·F`` windows is
  cycled (window i is window ``i mod count``) and the set says so (``cycled``). An input without
  a time axis takes the row's first window.
- synthetic (``long:synthetic:scaled``): ``N(μ, σ²)`` per element at the full length, with the
  first recording's per-feature scale (``seqgate.verify.synthetic.scaled_windows``).

Only ``rows·F`` windows of a recording are read: memory is bounded by the streams, not by the
recording.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from seqgate.verify.recordings import InputSpec, Recording, check_finite, feature_stats
from seqgate.verify.synthetic import scaled_windows, time_axis

Array = np.ndarray[Any, Any]


@dataclass
class LongStream:
    """One set of long streams, window-first (``[rows, …]``), and how its rows were formed."""

    label: str
    kind: str  # "recorded" | "synthetic"
    feeds: dict[str, Array]
    steps: int
    window: int  # T: the window length, also the steps per call when streamed
    how: str
    cycled: bool = False

    def to_json(self) -> dict[str, Any]:
        return {"label": self.label, "kind": self.kind, "how": self.how, "cycled": self.cycled,
                "rows": int(next(iter(self.feeds.values())).shape[0]), "steps": self.steps,
                "window_steps": self.window}


def window_steps(specs: list[InputSpec], rec: Recording) -> int | None:
    """The window length ``T`` of a set: its first input's time axis, if any input has one."""
    for s in specs:
        t = time_axis(s)
        if t is not None and s.name in rec.arrays and len(rec.arrays[s.name].shape) > t:
            return int(rec.arrays[s.name].shape[t])
    return None


def from_recording(rec: Recording, specs: list[InputSpec], factor: int, rows: int) -> LongStream:
    """Row j = windows ``j·F … j·F+F−1`` of ``rec`` joined along time (module docstring)."""
    need = rows * factor
    have = min(rec.windows, need)
    block = {}
    for name, arr in rec.arrays.items():
        block[name] = arr.read(0, have)
        check_finite(block[name], 0, f"{rec.label} array {name!r}")
    index = np.arange(need) % have
    axes = {s.name: time_axis(s) for s in specs}
    feeds = {}
    for name, x in block.items():
        t = axes.get(name)
        per_row = [x[index[j * factor:(j + 1) * factor]] for j in range(rows)]
        if t is None:
            feeds[name] = np.stack([w[0] for w in per_row])
        else:  # the windows of a row, side by side along the time axis (t − 1 without the windows axis)
            feeds[name] = np.stack([np.concatenate(list(w), axis=t - 1) for w in per_row])
    steps = window_steps(specs, rec) or 0
    cycled = have < need
    how = (f"row j = recorded windows j·{factor} … j·{factor}+{factor - 1} of {rec.label} joined along time "
           f"({rows} rows of {factor} windows × {steps} steps)")
    if cycled:
        how += f"; the recording holds {rec.windows} windows, fewer than {need}: windows repeat cyclically"
    return LongStream(f"long:{rec.label}", "recorded", feeds, steps * factor, steps, how, cycled)


def synthetic_stream(specs: list[InputSpec], stats: Any, seed: int, window: int, factor: int,
                     rows: int) -> LongStream:
    """``rows`` scaled-noise streams of ``factor·window`` steps (module docstring)."""
    steps = factor * window
    feeds = scaled_windows(specs, stats, seed, rows, steps)
    scale = "the first recording's per-feature mean and std" if stats else "unit scale (no recording)"
    how = f"{rows} rows of N(μ, σ²) noise, {steps} steps, {scale}, seed {seed}"
    return LongStream("long:synthetic:scaled", "synthetic", feeds, steps, window, how)


def long_streams(recs: list[Recording], specs: list[InputSpec], factor: int, rows: int, seed: int,
                 batch_size: int) -> list[LongStream]:
    """One set per recording, then the synthetic set; the window length is the first set's."""
    if not recs:
        return []
    steps = window_steps(specs, recs[0])
    if not steps:
        return []
    recorded = [r for r in recs if r.kind == "recorded"]
    out = [from_recording(r, specs, factor, rows) for r in recorded]
    stats = feature_stats(recorded[0], batch_size) if recorded else None
    out.append(synthetic_stream(specs, stats, seed, steps, factor, rows))
    return out
