"""Profiler arithmetic against numpy, the standard library's ``statistics`` and hand-worked cases."""

from __future__ import annotations

import statistics

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from seqgate.profile.stats import LineFit, fit_line, longest_within, percentile, summarize_ns

samples = st.lists(st.integers(min_value=1, max_value=10**9), min_size=1, max_size=300)


@settings(max_examples=150, deadline=None)
@given(samples, st.sampled_from([0, 1, 10, 25, 50, 90, 95, 99, 100]))
def test_percentile_matches_numpy_linear(values: list[int], q: int) -> None:
    # numpy.percentile's default method="linear" is the interpolation in the module docstring
    xs = sorted(float(v) for v in values)
    assert percentile(xs, q) == pytest.approx(float(np.percentile(xs, q)), rel=1e-12, abs=1e-9)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.floats(min_value=-1e6, max_value=1e6), min_size=2, max_size=200))
def test_percentiles_match_statistics_quantiles_inclusive(values: list[float]) -> None:
    # statistics.quantiles(n=100, method="inclusive") gives the 1st..99th percentiles with the
    # same closest-ranks interpolation (Python docs, statistics.quantiles)
    xs = sorted(values)
    qs = statistics.quantiles(xs, n=100, method="inclusive")
    for q in (50, 90, 99):
        assert percentile(xs, q) == pytest.approx(qs[q - 1], rel=1e-9, abs=1e-6)


def test_percentile_hand_worked() -> None:
    # 4 samples 10, 20, 30, 40: h = (4−1)·0.9 = 2.7 → 30 + 0.7·(40 − 30) = 37
    assert percentile([10.0, 20.0, 30.0, 40.0], 90) == pytest.approx(37.0)
    # the median of an even count is the midpoint: h = 1.5 → 20 + 0.5·10 = 25
    assert percentile([10.0, 20.0, 30.0, 40.0], 50) == pytest.approx(25.0)
    with pytest.raises(ValueError):
        percentile([], 50)


@settings(max_examples=100, deadline=None)
@given(samples)
def test_summary_matches_statistics(values: list[int]) -> None:
    s = summarize_ns(values)
    ms = [v / 1e6 for v in values]
    assert s.runs == len(values)
    assert s.mean_ms == pytest.approx(statistics.fmean(ms), rel=1e-12)
    assert s.p50_ms == pytest.approx(statistics.median(ms), rel=1e-12)
    # sample standard deviation (n − 1), statistics.stdev; 0 for one sample by our contract
    expected_std = statistics.stdev(ms) if len(ms) > 1 else 0.0
    assert s.std_ms == pytest.approx(expected_std, rel=1e-9, abs=1e-12)
    assert (s.min_ms, s.max_ms) == (min(ms), max(ms))
    assert s.at(99) == s.p99_ms and s.at(90) == s.p90_ms


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.integers(1, 4096), st.floats(0.001, 1000.0)), min_size=2, max_size=40))
def test_fit_matches_numpy_polyfit(pairs: list[tuple[int, float]]) -> None:
    ts = [float(t) for t, _ in pairs]
    ys = [y for _, y in pairs]
    fit = fit_line(ts, ys)
    if len(set(ts)) < 3:  # a line needs three distinct lengths (seqgate.profile.stats)
        assert fit is None
        return
    assert fit is not None
    b, a = np.polyfit(ts, ys, 1)  # numpy returns the highest degree first
    scale = max(abs(y) for y in ys)
    assert fit.b_ms_per_step == pytest.approx(b, rel=1e-6, abs=1e-9 * scale)
    assert fit.a_ms == pytest.approx(a, rel=1e-6, abs=1e-7 * scale)
    # R² = squared Pearson correlation for a straight-line least-squares fit (numpy.corrcoef)
    if np.std(ys) > 1e-9 * scale:
        r = np.corrcoef(ts, ys)[0, 1]
        assert fit.r2 == pytest.approx(r * r, abs=1e-6)


def test_fit_hand_worked() -> None:
    # points on y = 0.5 + 0.25·T exactly: a = 0.5, b = 0.25, R² = 1
    fit = fit_line([1, 8, 32, 128], [0.75, 2.5, 8.5, 32.5])
    assert fit is not None
    assert (fit.a_ms, fit.b_ms_per_step, fit.r2) == pytest.approx((0.5, 0.25, 1.0))
    # three points (1, 1), (2, 3), (3, 2): T̄ = 2, ȳ = 2, Sxy = (−1)(−1) + 0 + (1)(0) = 1, Sxx = 2
    # → b = 0.5, a = 2 − 0.5·2 = 1; residuals −0.5, 1, −0.5 → SSres 1.5, SStot 2 → R² = 0.25
    fit = fit_line([1, 2, 3], [1, 3, 2])
    assert fit is not None
    assert (fit.a_ms, fit.b_ms_per_step, fit.r2) == pytest.approx((1.0, 0.5, 0.25))
    assert fit_line([5, 5], [1.0, 2.0]) is None


def test_longest_within_hand_worked() -> None:
    line = LineFit(a_ms=0.5, b_ms_per_step=0.25, r2=1.0, n=4)
    # 0.5 + 0.25·T ≤ 5 → T ≤ 18
    assert longest_within(line, 5.0) == 18
    # 0.5 + 0.25·T ≤ 5.1 → T ≤ 18.4 → 18
    assert longest_within(line, 5.1) == 18
    # even T = 1 costs 0.75 ms > 0.6 ms
    assert longest_within(line, 0.6) == 0
    # a flat or falling line under the budget sets no limit
    assert longest_within(LineFit(1.0, 0.0, 1.0, 3), 2.0) is None
    assert longest_within(LineFit(1.0, -0.1, 1.0, 3), 0.5) == 0
