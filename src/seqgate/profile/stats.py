"""Pure arithmetic of the profiler: percentiles, summary statistics, the latency line, budgets.

- Percentile ``q`` of ``n`` sorted samples ``x_0 ≤ … ≤ x_{n−1}``: linear interpolation between
  closest ranks, ``h = (n − 1)·q/100``, ``P = x_⌊h⌋ + (h − ⌊h⌋)·(x_⌊h⌋+1 − x_⌊h⌋)`` — numpy's
  default ``"linear"`` method and ``statistics.quantiles(method="inclusive")``.
- ``std`` is the sample standard deviation (``n − 1`` in the denominator, like
  ``statistics.stdev``); 0 for a single sample.
- The fit is ordinary least squares of ``y = a + b·T``:
  ``b = Σ(T−T̄)(y−ȳ) / Σ(T−T̄)²``, ``a = ȳ − b·T̄``, ``R² = 1 − Σ(y − a − b·T)² / Σ(y − ȳ)²``
  (``R² = 1`` when every ``y`` is equal, since the line then explains everything). It needs at
  least ``MIN_FIT_LENGTHS = 3`` distinct lengths: two points always lie on a line (R² = 1 says
  nothing), and the intercept's standard error needs ``n − 2 ≥ 1`` degrees of freedom.
- A fit is *poor* when ``R² < POOR_R2`` (0.95 — common practice for calling a straight line a
  good description of measurements) or when the intercept is negative beyond its noise,
  ``a < −2·SE(a)`` with ``SE(a) = s·√(1/n + T̄²/Σ(T−T̄)²)``, ``s² = Σ(y − a − b·T)²/(n − 2)``
  (about a 95 % one-sided bound, common practice): a latency cannot be negative at T = 0.
- A prediction at ``T`` is *extrapolated* when ``T`` lies outside the measured lengths
  ``[T_min, T_max]``; an unbounded prediction (``None``) is extrapolated too.
- The longest length predicted to fit a budget ``MS`` is the largest integer ``T ≥ 1`` with
  ``a + b·T ≤ MS``: ``⌊(MS − a)/b⌋`` for ``b > 0``; unbounded (``None``) when ``b ≤ 0`` and the
  line is under the budget at ``T = 1``; ``0`` when even ``T = 1`` is predicted to miss.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

MIN_FIT_LENGTHS = 3
POOR_R2 = 0.95  # common practice: below this a straight line describes measurements poorly
TOO_FEW_LENGTHS = "too few lengths to fit"


def percentile(sorted_values: Sequence[float], q: float) -> float:
    """Percentile ``q`` (0..100) of already sorted values (see the module docstring)."""
    n = len(sorted_values)
    if n == 0:
        raise ValueError("percentile of no samples")
    if not 0.0 <= q <= 100.0:
        raise ValueError(f"percentile {q} is outside 0..100")
    h = (n - 1) * q / 100.0
    lo = math.floor(h)
    hi = min(lo + 1, n - 1)
    return float(sorted_values[lo] + (h - lo) * (sorted_values[hi] - sorted_values[lo]))


@dataclass(frozen=True)
class Stats:
    """Summary of one point's timed runs, in milliseconds."""

    p50_ms: float
    p90_ms: float
    p99_ms: float
    min_ms: float
    max_ms: float
    mean_ms: float
    std_ms: float
    runs: int

    def at(self, q: int) -> float:
        """The p50/p90/p99 figure picked by ``q``."""
        return {50: self.p50_ms, 90: self.p90_ms, 99: self.p99_ms}[q]


def summarize_ns(samples_ns: Sequence[int]) -> Stats:
    """Stats of run times given in integer nanoseconds (``time.perf_counter_ns`` deltas)."""
    ms = sorted(s / 1e6 for s in samples_ns)
    n = len(ms)
    if n == 0:
        raise ValueError("no timed runs")
    mean = math.fsum(ms) / n
    var = math.fsum((x - mean) ** 2 for x in ms) / (n - 1) if n > 1 else 0.0
    return Stats(
        p50_ms=percentile(ms, 50), p90_ms=percentile(ms, 90), p99_ms=percentile(ms, 99),
        min_ms=ms[0], max_ms=ms[-1], mean_ms=mean, std_ms=math.sqrt(var), runs=n,
    )


@dataclass(frozen=True)
class LineFit:
    """``latency_ms(T) = a_ms + b_ms_per_step · T``, its R², point count, and what was measured."""

    a_ms: float
    b_ms_per_step: float
    r2: float
    n: int
    a_stderr_ms: float = 0.0
    t_min: float = 0.0
    t_max: float = 0.0

    def predict(self, t: float) -> float:
        return self.a_ms + self.b_ms_per_step * t

    def poor_reasons(self) -> list[str]:
        """Why the line is a poor description of the points (empty: it is not poor)."""
        out = []
        if self.r2 < POOR_R2:
            out.append(f"R² {self.r2:.3f} < {POOR_R2}")
        if self.a_ms < -2 * self.a_stderr_ms:
            noise = 2 * self.a_stderr_ms
            out.append(f"negative intercept {self.a_ms:.3g} ms beyond noise (2·SE {noise:.3g} ms)")
        return out

    def extrapolated(self, t: float | None) -> bool:
        """True when ``t`` lies outside the measured lengths (``None``, unbounded, always does)."""
        return t is None or not self.t_min <= t <= self.t_max


def fit_line(ts: Sequence[float], ys: Sequence[float]) -> LineFit | None:
    """Least-squares line through ``(T, y)``; ``None`` with fewer than ``MIN_FIT_LENGTHS`` distinct ``T``."""
    n = len(ts)
    if n != len(ys):
        raise ValueError("fit_line: ts and ys differ in length")
    if len(set(ts)) < MIN_FIT_LENGTHS:
        return None
    t_mean = math.fsum(ts) / n
    y_mean = math.fsum(ys) / n
    sxx = math.fsum((t - t_mean) ** 2 for t in ts)
    sxy = math.fsum((t - t_mean) * (y - y_mean) for t, y in zip(ts, ys, strict=True))
    b = sxy / sxx
    a = y_mean - b * t_mean
    ss_res = math.fsum((y - a - b * t) ** 2 for t, y in zip(ts, ys, strict=True))
    ss_tot = math.fsum((y - y_mean) ** 2 for y in ys)
    r2 = 1.0 - ss_res / ss_tot if ss_tot > 0 else 1.0
    se_a = math.sqrt(ss_res / (n - 2) * (1 / n + t_mean**2 / sxx))
    return LineFit(a, b, r2, n, se_a, float(min(ts)), float(max(ts)))


def longest_within(fit: LineFit, budget_ms: float) -> int | None:
    """Largest integer ``T ≥ 1`` predicted to meet ``budget_ms``; ``None`` = no limit, 0 = none."""
    a, b = fit.a_ms, fit.b_ms_per_step
    if a + b * 1 > budget_ms:
        return 0
    if b <= 0:
        return None
    return max(1, math.floor((budget_ms - a) / b))
