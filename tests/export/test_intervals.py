"""The interval rules of ``seqgate.export.torch.intervals`` against brute force.

Every rule is checked over small integer domains with every combination of values, computed by
NumPy element-wise (the independent computation): the rule's span must hold every result
(soundness) and, for these rules on integer intervals, be exactly the smallest and largest result
(tightness); a comparison must say TRUE/FALSE exactly when every combination agrees.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
import torch

from seqgate.export.torch import intervals as iv
from seqgate.export.torch.intervals import Span

DOMAIN = range(-3, 4)
SPANS = [(lo, hi) for lo in DOMAIN for hi in DOMAIN if lo <= hi]
BOOLS = [(0, 0), (0, 1), (1, 1)]


def _values(s: tuple[int, int]) -> np.ndarray:
    return np.arange(s[0], s[1] + 1)


def _pairs(spans: list[tuple[int, int]]) -> Any:
    for a, b in itertools.product(spans, spans):
        x, y = np.meshgrid(_values(a), _values(b), indexing="ij")
        yield Span.of(*a), Span.of(*b), x.ravel(), y.ravel()


@pytest.mark.parametrize(("rule", "numpy_op"), [
    (iv.add, np.add), (iv.sub, np.subtract), (iv.mul, np.multiply),
    (iv.lower, np.minimum), (iv.upper, np.maximum),
])
def test_arithmetic_is_the_exact_hull(rule: Callable[[Span, Span], Span], numpy_op: Any) -> None:
    for a, b, x, y in _pairs(SPANS):
        got = numpy_op(x, y)
        s = rule(a, b)
        assert (s.lo, s.hi) == (got.min(), got.max()), (a, b, s)
        assert s.mag >= np.abs(got).max()


def test_negation() -> None:
    for a in SPANS:
        got = -_values(a)
        s = iv.neg(Span.of(*a))
        assert (s.lo, s.hi) == (got.min(), got.max())


@pytest.mark.parametrize(("name", "numpy_op"), [
    ("eq", np.equal), ("ne", np.not_equal), ("lt", np.less), ("le", np.less_equal),
    ("gt", np.greater), ("ge", np.greater_equal),
])
def test_comparisons_decide_exactly_when_every_combination_agrees(name: str, numpy_op: Any) -> None:
    for a, b, x, y in _pairs(SPANS):
        got = numpy_op(x, y)
        s = iv.compare(name, a, b)
        assert (s.lo, s.hi) == (int(got.min()), int(got.max())), (name, a, b, s)


@pytest.mark.parametrize(("rule", "numpy_op"), [(iv.both, np.logical_and), (iv.either, np.logical_or)])
def test_boolean_and_or(rule: Callable[[Span, Span], Span], numpy_op: Any) -> None:
    for a, b, x, y in _pairs(BOOLS):
        got = numpy_op(x, y).astype(int)
        s = rule(a, b)
        assert (s.lo, s.hi) == (got.min(), got.max())


def test_boolean_not_and_truth() -> None:
    for a in BOOLS:
        s = iv.negate(Span.of(*a))
        got = np.logical_not(_values(a)).astype(int)
        assert (s.lo, s.hi) == (got.min(), got.max())
    for a in SPANS:
        t = iv.truth(Span.of(*a))
        got = (_values(a) != 0).astype(int)
        assert (t.lo, t.hi) == (got.min(), got.max())


def test_clamp_against_the_documented_formula() -> None:
    # torch.clamp docs: y = min(max(x, min_value), max_value) (max wins when min > max)
    for (a, b, x, y), c in itertools.product(_pairs(SPANS[::3]), SPANS[::4]):
        for z in _values(c):
            got = np.minimum(np.maximum(x, y), z)
            s = iv.clamp(a, b, Span.of(int(z), int(z)))
            assert s.lo <= got.min() and got.max() <= s.hi
        s = iv.clamp(a, b, Span.of(*c))
        every = [np.minimum(np.maximum(x, y), z) for z in _values(c)]
        assert (s.lo, s.hi) == (min(g.min() for g in every), max(g.max() for g in every))


@pytest.mark.parametrize("filled", [True, False])
def test_any_all_over_every_small_tensor(filled: bool) -> None:
    # numpy: any() of an empty array is False, all() is True
    for a in SPANS:
        sizes = range(1, 4) if filled else range(0, 4)
        results_any, results_all = set(), set()
        for n in sizes:
            for t in itertools.product(_values(a), repeat=n):
                results_any.add(bool(np.any(t)))
                results_all.add(bool(np.all(t)))
        span = Span.of(*a, filled=filled)
        for rule, seen in ((iv.any_of, results_any), (iv.all_of, results_all)):
            s = rule(span, True)
            assert {bool(v) for v in range(int(s.lo), int(s.hi) + 1)} >= seen  # sound
            if len(seen) == 1:
                assert s.lo == s.hi == int(seen.pop()), (rule, a, filled)  # decided when it can be


def test_arange_holds_every_element() -> None:
    for s, e in itertools.product(SPANS, SPANS):
        span = iv.arange(Span.of(*s), Span.of(*e))
        assert span is not None
        nonempty_always = True
        for i, j in itertools.product(_values(s), _values(e)):
            got = np.arange(i, j)
            nonempty_always &= got.size > 0
            assert got.size == 0 or (span.lo <= got.min() and got.max() <= span.hi)
        assert span.filled == nonempty_always


def test_casts_truncate_toward_zero_and_round_to_nearest() -> None:
    halves = Span.of(-2.5, 3.5, whole=False)
    s = iv.cast(halves, torch.zeros(1, dtype=torch.int64))
    got = np.trunc(np.arange(-2.5, 3.51, 0.25))  # C's and torch's float→int conversion truncates
    assert s is not None and (s.lo, s.hi) == (got.min(), got.max())
    # IEEE-754 binary32 has a 24-bit significand: 2**24 + 1 rounds (to nearest, ties to even) to 2**24
    f = iv.cast(Span.of(2**24 + 1, 2**24 + 1), torch.zeros(1))
    assert f is not None and f.lo == f.hi == float(np.float32(2**24 + 1)) == 2**24


def test_integer_results_that_may_wrap_are_unknown() -> None:
    time = iv.dim_span("time")
    int64 = torch.zeros(1, dtype=torch.int64)
    # int64 holds at most 2**63 - 1 (two's complement); 2**30 · 2**40 does not fit
    assert iv.fit(iv.mul(time, Span.of(2**40, 2**40)), int64) is None
    assert iv.fit(iv.mul(time, Span.of(2, 2)), int64) is not None
    assert iv.cast(iv.bound_span(1, 2**31), torch.zeros(1, dtype=torch.int32)) is None  # int32 max 2**31-1
    assert iv.cast(iv.bound_span(1, "time"), torch.zeros(1, dtype=torch.int32)) is not None


def test_dims_and_declared_bounds() -> None:
    assert (iv.dim_span("time").lo, iv.dim_span("time").hi) == (1, iv.INF)
    assert iv.dim_span("time-1").lo == 0 and iv.dim_span("time+2").lo == 3
    assert (iv.dim_span(24).lo, iv.dim_span(24).hi) == (24, 24)
    s = iv.bound_span("time-1", "time")
    assert (s.lo, s.hi) == (0, iv.INF)
    assert iv.outcome(iv.compare("eq", iv.bound_span(1, "time"), Span.of(0, 0))) is False
    assert iv.outcome(iv.compare("eq", iv.bound_span(0, "time"), Span.of(0, 0))) is None
