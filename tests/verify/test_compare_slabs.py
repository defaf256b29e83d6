"""The float32 statistics (computed in slabs of windows) against a straightforward float64 NumPy
computation on the whole array, and independent of the slab size and of sharding."""

from __future__ import annotations

import math

import numpy as np
import pytest

from seqgate.verify import compare
from seqgate.verify.compare import HIST_REL_WIDTH, REL_FLOOR, TensorStats, merge_shards

ATOL, RTOL = 1e-5, 1e-5


def _pair(rng: np.random.Generator, shape: tuple[int, ...], bad_windows: tuple[int, ...] = ()
          ) -> tuple[np.ndarray, np.ndarray]:
    src = rng.normal(size=shape).astype(np.float32)
    src[rng.random(shape) < 0.05] = 0.0  # |source| below REL_FLOOR: the floor decides max_rel there
    err = rng.normal(scale=2e-6, size=shape) * rng.random(shape) ** 3
    onx = (src + err).astype(np.float32)
    for w in bad_windows:  # out of tolerance: those batches take the float64 path
        onx[w, 3, 0, 1] += np.float32(1e-3)
    # the ONNX side arrives as a transposed view (time-major output): not contiguous
    return np.ascontiguousarray(np.swapaxes(onx, 0, 1)).swapaxes(0, 1), src


def _stream(onx: np.ndarray, src: np.ndarray, batch: int, first: int = 0, scores: bool = True,
            atol: float = ATOL, rtol: float = RTOL) -> tuple[TensorStats, list[np.ndarray]]:
    st = TensorStats(atol, rtol, time_indexed=True, window_scores=scores)
    window_max = []
    for s in range(0, len(src), batch):
        st.update(onx[s:s + batch], src[s:s + batch], first + s)
        if scores:
            assert st.window_max is not None
            window_max.append(st.window_max.copy())
    return st, window_max


@pytest.mark.parametrize("slab", [1, 700, 2000, 1 << 30])  # one window per slab .. the whole batch
@pytest.mark.parametrize("bad", [(), (13,)])
@pytest.mark.parametrize("scores", [True, False])
def test_statistics_equal_numpy_on_the_whole_array(rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch,
                                                   slab: int, bad: tuple[int, ...], scores: bool) -> None:
    monkeypatch.setattr(compare, "SLAB_ELEMENTS", slab)
    onx, src = _pair(rng, (45, 30, 1, 20), bad)
    st, window_max = _stream(onx, src, 16, scores=scores)  # uneven last batch; slab 700 = 1 window + a part
    a, b = onx.astype(np.float64), src.astype(np.float64)
    d = np.abs(a - b)
    m = st.metrics()
    assert m["elements"] == d.size and m["windows"] == 45
    assert m["max_abs"] == d.max()  # exact: recomputed in float64 at the float32 maximum
    # numpy.isclose's documented rule |a - b| <= atol + rtol*|b|, b the reference
    assert m["outside"] == int((~np.isclose(a, b, rtol=RTOL, atol=ATOL)).sum()) == len(bad)
    # numpy.percentile(method="higher") picks an element; the histogram bin's upper edge is never
    # below it and at most one bin width (1/64, the module's stated bound) above it
    p99 = float(np.percentile(d, 99, method="higher"))
    assert p99 <= m["p99_abs"] <= p99 * (1 + HIST_REL_WIDTH)
    # float32 quotients/sums on the fast path: a few float32 roundings (2**-24 each, IEEE-754)
    assert m["max_rel"] == pytest.approx((d / np.maximum(np.abs(b), REL_FLOOR)).max(), rel=1e-6)
    assert m["mean_abs"] == pytest.approx(d.mean(), rel=1e-6)
    assert m["rms"] == pytest.approx(math.sqrt((d * d).mean()), rel=1e-6)
    assert st.per_step_max_abs() == pytest.approx(d.max(axis=(0, 2, 3)).tolist(), rel=1e-6)
    w = np.unravel_index(np.argmax(d), d.shape)
    assert (m["worst"]["window"], m["worst"]["step"], m["worst"]["index"]) == (w[0], w[1], [w[2], w[3]])
    if scores:
        ratio = (d / (ATOL + RTOL * np.abs(b))).reshape(45, -1).max(axis=1)
        assert np.concatenate(window_max) == pytest.approx(ratio, rel=1e-6)
    assert st.first_bad_step() == (3 if bad else None)


def test_results_do_not_depend_on_the_slab_size(rng: np.random.Generator,
                                                monkeypatch: pytest.MonkeyPatch) -> None:
    onx, src = _pair(rng, (37, 12, 1, 9))
    runs = []
    for slab in (1, 250, 1 << 30):
        monkeypatch.setattr(compare, "SLAB_ELEMENTS", slab)
        st, window_max = _stream(onx, src, 10)
        runs.append((st.metrics(), st.hist.copy(), np.concatenate(window_max), st.max_rel, st.sum_abs))
    for other in runs[1:]:
        assert other[0] == runs[0][0]
        assert np.array_equal(other[1], runs[0][1]) and np.array_equal(other[2], runs[0][2])
        assert other[3:] == runs[0][3:]


def test_shards_merge_to_the_single_pass(rng: np.random.Generator, monkeypatch: pytest.MonkeyPatch) -> None:
    # Ray workers check consecutive ranges of whole batches; merge_shards must give the one-pass result
    monkeypatch.setattr(compare, "SLAB_ELEMENTS", 500)
    onx, src = _pair(rng, (48, 20, 1, 16), bad_windows=(30,))
    whole, _ = _stream(onx, src, 8)
    parts = [_stream(onx[s:s + 16], src[s:s + 16], 8, first=s)[0] for s in (0, 16, 32)]
    merged = merge_shards(parts)
    mw, mm = whole.metrics(), merged.metrics()
    for key in ("max_abs", "max_rel", "p99_abs", "outside", "worst", "elements", "first_bad_step"):
        assert mm[key] == mw[key], key
    assert np.array_equal(merged.hist, whole.hist)
    assert merged.per_step_max_abs() == whole.per_step_max_abs()
    assert mm["mean_abs"] == pytest.approx(mw["mean_abs"], rel=1e-12)


@pytest.mark.parametrize("atol, rtol, scale", [
    (1e-5, 1e-5, 2e-6),  # |Δ|/atol proves every batch inside: the quotient is skipped
    (1e-9, 1e-3, 3e-4),  # |Δ|/atol passes the limit but |Δ|/tol does not: the quotient decides
    (1e-9, 1e-3, 3e-3),  # outside tolerance: the float64 path
])
def test_without_window_scores_the_statistics_are_the_same(rng: np.random.Generator, atol: float, rtol: float,
                                                           scale: float) -> None:
    src = rng.normal(size=(30, 8, 1, 6)).astype(np.float32)
    onx = (src + rng.normal(scale=scale, size=src.shape) * np.abs(src)).astype(np.float32)
    with_scores, _ = _stream(onx, src, 7, atol=atol, rtol=rtol)
    without, _ = _stream(onx, src, 7, scores=False, atol=atol, rtol=rtol)
    assert without.metrics() == with_scores.metrics()
    assert np.array_equal(without.hist, with_scores.hist) and without.sum_abs == with_scores.sum_abs
    if without.outside == 0:  # every batch on the float32 path: no window scores were made
        assert without.window_max is None
    # numpy.isclose's documented rule decides the count, whichever path a batch took
    a, b = onx.astype(np.float64), src.astype(np.float64)
    assert without.outside == int((~np.isclose(a, b, rtol=rtol, atol=atol)).sum())
