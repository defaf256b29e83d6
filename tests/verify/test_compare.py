"""Tolerance rule and streaming metrics, checked against numpy/statistics computed independently."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from seqgate.errors import BadInputError
from seqgate.verify.compare import (
    HIST_REL_WIDTH,
    REL_FLOOR,
    TensorStats,
    merge_stats,
    within_tolerance,
)
from seqgate.verify.tolerances import load_tolerances

finite32 = st.floats(-1e6, 1e6, allow_nan=False, width=32)


@settings(max_examples=200, deadline=None)
@given(
    a=hnp.arrays(np.float32, st.integers(1, 40), elements=finite32),
    noise=st.floats(-1e-3, 1e-3),
    atol=st.floats(0, 1e-2),
    rtol=st.floats(0, 1e-2),
)
def test_rule_is_numpy_isclose_with_source_as_b(a: np.ndarray, noise: float, atol: float, rtol: float) -> None:
    # numpy.isclose documents its rule as |a - b| <= atol + rtol * |b| (b the reference): same form.
    b = (a.astype(np.float64) * (1 + noise) + noise).astype(np.float32)
    got = within_tolerance(a, b, atol, rtol)
    want = np.isclose(a.astype(np.float64), b.astype(np.float64), rtol=rtol, atol=atol)
    assert np.array_equal(got, want)


def test_rule_is_asymmetric_the_source_is_the_reference() -> None:
    # hand-worked: |1.1 - 1.0| = 0.1 <= 0 + 0.1*|1.0| holds; |1.0 - 1.1| = 0.1 <= 0.1*|1.1|=0.11 holds;
    # with rtol 0.095: 0.1 <= 0.095 fails but 0.1 <= 0.1045 holds -> order matters.
    assert not within_tolerance(np.array([1.1]), np.array([1.0]), 0.0, 0.095)[0]
    assert within_tolerance(np.array([1.0]), np.array([1.1]), 0.0, 0.095)[0]


def test_nan_is_outside_and_matching_infinities_are_inside() -> None:
    # IEEE-754: NaN compares false with everything, so |NaN - x| <= tol is false.
    # An infinite source must not make the bound atol + rtol*|source| infinite (that would pass anything).
    ok = within_tolerance(np.array([np.nan, 1.0, np.inf, np.inf, 5.0]),
                          np.array([1.0, np.nan, np.inf, -np.inf, np.inf]), 1, 1)
    assert ok.tolist() == [False, False, True, False, False]


@settings(max_examples=150, deadline=None)
@given(
    b=hnp.arrays(np.float32, (3, 5, 2), elements=st.floats(-4, 4, width=32)),
    scale=st.sampled_from([1e-7, 1e-6, 5e-6, 1e-5, 2e-5, 1e-4]),
    seed=st.integers(0, 2**16),
)
def test_outside_count_equals_numpy_isclose_near_the_boundary(b: np.ndarray, scale: float, seed: int) -> None:
    # The float32 screening must never change the count: compare with numpy.isclose in float64.
    r = np.random.default_rng(seed)
    a = (b.astype(np.float64) + r.choice([-1, 1], b.shape) * scale * (1 + np.abs(b))).astype(np.float32)
    s_ = TensorStats(1e-5, 1e-5)
    s_.update(a, b, 0)
    want = int((~np.isclose(a.astype(np.float64), b.astype(np.float64), rtol=1e-5, atol=1e-5)).sum())
    assert s_.outside == want
    assert s_.max_abs == np.abs(a.astype(np.float64) - b.astype(np.float64)).max()


def _one_shot(a: np.ndarray, b: np.ndarray) -> dict[str, float]:
    d = np.abs(a.astype(np.float64) - b.astype(np.float64))
    return {"max": d.max(), "mean": d.mean(), "rms": math.sqrt((d * d).mean()),
            "p99": float(np.percentile(d, 99, method="higher")),
            "rel": (d / np.maximum(np.abs(b.astype(np.float64)), REL_FLOOR)).max()}


def test_streaming_metrics_match_numpy_on_the_whole_array(rng: np.random.Generator) -> None:
    src = rng.normal(size=(50, 9, 1, 4)).astype(np.float32)
    onx = (src + rng.normal(scale=1e-6, size=src.shape) * rng.random(src.shape) ** 4).astype(np.float32)
    st_ = TensorStats(1e-5, 1e-5, time_indexed=True)
    for start in range(0, 50, 7):  # uneven batches
        st_.update(onx[start:start + 7], src[start:start + 7], start)
    ref = _one_shot(onx, src)
    m = st_.metrics()
    assert m["max_abs"] == pytest.approx(ref["max"], rel=0, abs=0)
    # fast path: the mean/RMS sums and max_rel are float32 computations (documented), ~1e-7 relative
    assert m["mean_abs"] == pytest.approx(ref["mean"], rel=1e-6)
    assert m["rms"] == pytest.approx(ref["rms"], rel=1e-6)
    assert m["max_rel"] == pytest.approx(ref["rel"], rel=1e-6)
    # p99 from the histogram: never below the exact value, at most one bin width above it
    assert ref["p99"] <= m["p99_abs"] <= ref["p99"] * (1 + HIST_REL_WIDTH)
    want_out = int((~np.isclose(onx.astype(np.float64), src.astype(np.float64), rtol=1e-5, atol=1e-5)).sum())
    assert m["outside"] == want_out
    d = np.abs(onx.astype(np.float64) - src.astype(np.float64))
    assert st_.per_step_max_abs() == pytest.approx(d.max(axis=(0, 2, 3)).tolist(), abs=0)
    w = np.unravel_index(np.argmax(d), d.shape)
    assert m["worst"]["window"] == w[0] and m["worst"]["step"] == w[1] and m["worst"]["index"] == [w[2], w[3]]


def test_drift_curve_and_first_bad_step_hand_made() -> None:
    src = np.zeros((2, 5, 1, 1), np.float32)
    onx = src.copy()
    onx[1, 3, 0, 0] = 1e-3  # window 1 leaves tolerance at step 3 only
    onx[0, 4, 0, 0] = 1e-6  # inside
    s = TensorStats(1e-5, 0.0, time_indexed=True)
    s.update(onx, src, 10)
    m = s.metrics()
    assert s.first_bad_step() == 3
    assert m["outside"] == 1 and m["worst"]["window"] == 11 and m["worst"]["step"] == 3
    assert m["drift_first"] == 0.0 and m["drift_last"] == pytest.approx(1e-6)


def test_top1_agreement_and_flips() -> None:
    src = np.array([[0.6, 0.4], [0.2, 0.8], [0.5, 0.5001], [0.9, 0.1]], np.float32)
    onx = np.array([[0.6, 0.4], [0.2, 0.8], [0.5002, 0.5], [0.9, 0.1]], np.float32)
    s = TensorStats(1e-5, 1e-5, class_scores=True)
    s.update(onx, src, 0)
    m = s.metrics()
    assert m["top1_agreement"] == 0.75 and m["label_flips"] == 1 and m["flip_windows"] == [2]


def test_merge_equals_single_pass(rng: np.random.Generator) -> None:
    a = rng.normal(size=(20, 6, 3))
    b = a + rng.normal(scale=1e-5, size=a.shape)
    whole = TensorStats(1e-5, 1e-5, time_indexed=True)
    whole.update(a, b, 0)
    p1, p2 = TensorStats(1e-5, 1e-5, time_indexed=True), TensorStats(1e-5, 1e-5, time_indexed=True)
    p1.update(a[:8], b[:8], 0)
    p2.update(a[8:], b[8:], 8)
    merged = merge_stats([p1, p2])
    for k in ("max_abs", "outside", "p99_abs", "max_rel"):
        assert merged.metrics()[k] == whole.metrics()[k]
    assert merged.metrics()["mean_abs"] == pytest.approx(whole.metrics()["mean_abs"], rel=1e-12)
    assert merged.per_step_max_abs() == whole.per_step_max_abs()


def test_tolerance_file_precedence(tmp_path) -> None:  # type: ignore[no-untyped-def]
    f = tmp_path / "tol.toml"
    f.write_text('atol = 2e-5\nrtol = 3e-5\n[[tolerance]]\nmatch = "enc/*"\natol = 1e-3\n'
                 '[[tolerance]]\nmatch = "enc/l1/*"\nrtol = 0.0\n')
    t = load_tolerances(str(f))
    # hand-worked from the documented precedence: defaults, file top level, then matching entries in order
    assert t.for_tensor("out") == (2e-5, 3e-5)
    assert t.for_tensor("enc/l0/forward/hidden_final") == (1e-3, 3e-5)
    assert t.for_tensor("enc/l1/forward/hidden_final") == (1e-3, 0.0)
    t2 = load_tolerances(str(f), atol=7e-6)
    assert t2.for_tensor("out") == (7e-6, 3e-5) and t2.for_tensor("enc/x") == (1e-3, 3e-5)
    assert t.unmatched(["out"]) == ["enc/*", "enc/l1/*"]
    # 0 is a valid tolerance, not "not given"
    assert load_tolerances(str(f), atol=0.0, rtol=0.0).for_tensor("out") == (0.0, 0.0)


@pytest.mark.parametrize("text, needle", [
    ("atol = -1", "atol must be a finite number"),
    ("atol = nan", "atol must be a finite number ≥ 0, got nan"),  # TOML has nan; IEEE-754: nan < 0 is false
    ("rtol = inf", "rtol must be a finite number ≥ 0, got inf"),
    ("speed = 1", "unknown key"),
    ("[[tolerance]]\natol = 1e-3\n", "[[tolerance]] entry 1: match is required"),
    ('[[tolerance]]\nmatch = "x"\natol = -1.0\n', "[[tolerance]] entry 1: atol must be a finite number"),
    ('[[tolerance]]\nmatch = "x"\n', "give atol and/or rtol"),
    ('[[tensor]]\nmatch = "x"\natol = 1e-3\n', "[[tensor]] is now written [[tolerance]]"),
    ("atol = ", "not valid TOML"),
])
def test_bad_tolerance_files(tmp_path, text: str, needle: str) -> None:  # type: ignore[no-untyped-def]
    f = tmp_path / "tol.toml"
    f.write_text(text)
    with pytest.raises(BadInputError) as e:
        load_tolerances(str(f))
    assert needle in str(e.value)
    assert f"tolerance file {f}" in str(e.value)


def test_every_problem_of_a_tolerance_file_at_once(tmp_path) -> None:  # type: ignore[no-untyped-def]
    f = tmp_path / "tol.toml"
    f.write_text('atol = nan\n[[tolerance]]\natol = -1.0\n[[tolerance]]\nmatch = "y"\nrtol = 1e-3\n')
    with pytest.raises(BadInputError) as e:
        load_tolerances(str(f), rtol=-2.0)
    msg = str(e.value)
    assert msg.count("\n  - ") == 4
    for piece in (f"tolerance file {f}: atol must be", "[[tolerance]] entry 1: match is required",
                  "[[tolerance]] entry 1: atol must be", "--rtol must be a finite number ≥ 0, got -2.0"):
        assert piece in msg, piece


def test_non_utf8_tolerance_file_is_bad_input(tmp_path) -> None:  # type: ignore[no-untyped-def]
    # 0xff never occurs in UTF-8 (RFC 3629); the old reader let UnicodeDecodeError through (exit 4)
    f = tmp_path / "tol.toml"
    f.write_bytes(b"atol = 1e-4 # \xff\n")
    with pytest.raises(BadInputError, match="is not UTF-8 text") as e:
        load_tolerances(str(f))
    assert e.value.exit_code == 2
