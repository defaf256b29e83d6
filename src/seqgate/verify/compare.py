"""The tolerance rule and streaming comparison metrics (pure NumPy).

Rule (DESIGN.md), elementwise, the source framework being the reference::

    |onnx − source| ≤ atol + rtol · |source|

The default atol/rtol and the per-tensor overrides are a setting (``seqgate.settings.tolerance``);
the tolerance file is read by ``seqgate.verify.tolerances``.

This is ``numpy.isclose(onnx, source, atol, rtol)`` (whose rule is ``|a − b| ≤ atol + rtol·|b|``)
with ``b = source``. NaN on either side is always outside tolerance; so is ±Inf unless both
sides hold the same infinity.

:class:`TensorStats` accumulates one tensor's errors batch by batch, so memory stays flat
however many windows are compared:

- ``max_abs`` (the float64 difference at the largest element), ``outside`` (count) and
  ``outside_fraction`` are exact; ``mean_abs`` and ``rms`` are float64 sums on the exact path
  and float32 pairwise/BLAS sums (~1e-6 relative) on the fast path (see :meth:`update`);
- ``max_rel`` = max ``|Δ| / max(|source|, REL_FLOOR)``; below the floor a relative error says
  nothing about float32 precision, so the floor keeps it finite and meaningful (a float32
  quotient on the fast path);
- ``p99_abs`` comes from a fixed histogram whose bins are the float32 bit patterns of ``|Δ|``
  shifted right by ``HIST_SHIFT`` (6 mantissa bits kept: 64 log-spaced bins per octave, from
  the smallest float32 to Inf). It is the upper edge of the bin holding the element that
  ``numpy.percentile(..., 99, method="higher")`` picks, so it is never below that value and at
  most ``1/64 ≈ 1.6 %`` above it. A histogram keeps memory constant and the result
  deterministic (a reservoir sample would depend on the seed); exactness matters for max and
  counts, which are exact;
- ``worst``: the (window, step, index) of the largest ``|Δ|``;
- time-indexed tensors (axis 1 is time) also keep the per-step max ``|Δ|`` (the drift curve)
  and the per-step count outside tolerance, from which ``first_bad_step`` is read;
- class-score tensors keep top-1 agreement (argmax over the last axis; ``score > 0.5`` when
  that axis has one unit) and the windows whose label flips (the first ``MAX_FLIPS_LISTED``
  are listed, all are counted).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

REL_FLOOR = 1e-3
HIST_SHIFT = 17  # float32: 23 mantissa bits − 6 kept
HIST_BINS = 1 << (31 - HIST_SHIFT)  # every non-negative float32 bit pattern, Inf included
HIST_REL_WIDTH = 1 / 64
FAST_MARGIN = 1e-4  # float32 screening: a batch whose every |Δ|/tol is below 1 − this is inside
MAX_FLIPS_LISTED = 50
SLAB_ELEMENTS = 1 << 16  # a slab's work arrays (~256 KB each) stay in a core's cache between passes


def within_tolerance(onnx_value: np.ndarray[Any, Any], source: np.ndarray[Any, Any],
                     atol: float, rtol: float) -> np.ndarray[Any, Any]:
    """Elementwise ``|onnx − source| ≤ atol + rtol·|source|`` (bool array), in float64."""
    a = np.asarray(onnx_value, dtype=np.float64)
    b = np.asarray(source, dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        # an infinite source would make the bound infinite: only the same infinity is inside
        ok = (np.abs(a - b) <= atol + rtol * np.abs(b)) & np.isfinite(a) & np.isfinite(b)
        same_inf = np.isinf(a) & np.isinf(b) & (np.sign(a) == np.sign(b))
    return ok | same_inf


def abs_error(onnx_value: np.ndarray[Any, Any], source: np.ndarray[Any, Any]) -> np.ndarray[Any, Any]:
    """``|onnx − source|`` in float64; NaN (or a mismatched infinity) becomes +Inf."""
    a = np.asarray(onnx_value, dtype=np.float64)
    b = np.asarray(source, dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        d = np.abs(a - b)
    same_inf = np.isinf(a) & np.isinf(b) & (np.sign(a) == np.sign(b))
    d[same_inf] = 0.0
    d[np.isnan(d)] = np.inf
    return d


def _bin_upper_edge(k: int) -> float:
    """The smallest float32 above every value of histogram bin ``k``."""
    if k + 1 >= HIST_BINS:
        return math.inf
    return float(np.asarray([(k + 1) << HIST_SHIFT], np.int32).view(np.float32)[0])


@dataclass
class TensorStats:
    """Streaming error statistics of one tensor (see the module docstring)."""

    atol: float
    rtol: float
    time_indexed: bool = False
    class_scores: bool = False
    count: int = 0
    outside: int = 0
    max_abs: float = 0.0
    max_rel: float = 0.0
    sum_abs: float = 0.0
    sum_sq: float = 0.0
    worst: tuple[int, int | None, tuple[int, ...]] | None = None
    worst_source: float | None = None
    worst_onnx: float | None = None
    step_max: np.ndarray[Any, Any] | None = None
    step_outside: np.ndarray[Any, Any] | None = None
    windows: int = 0
    top1_agree: int = 0
    top1_total: int = 0
    flips: int = 0
    flip_windows: list[int] = field(default_factory=list)
    hist: np.ndarray[Any, Any] = field(default_factory=lambda: np.zeros(HIST_BINS, np.int64))
    window_max: np.ndarray[Any, Any] | None = None  # per window of the last batch (ratio to tol)
    window_scores: bool = True  # keep window_max (verify's worst windows, read by the oracle only)
    _scratch: dict[str, np.ndarray[Any, Any]] = field(default_factory=dict, repr=False)

    def release(self) -> None:
        """Free the work arrays (call when a recording is done)."""
        self._scratch.clear()

    def _buf(self, key: str, shape: tuple[int, ...]) -> np.ndarray[Any, Any]:
        """A reused float32 work array (fresh large arrays cost page faults on every batch)."""
        b = self._scratch.get(key)
        if b is None or b.shape != shape:
            b = self._scratch[key] = np.empty(shape, np.float32)
        return b

    def update(self, onnx_value: np.ndarray[Any, Any], source: np.ndarray[Any, Any], first_window: int) -> None:
        """Add one batch: arrays ``[N, ...]`` of equal shape; ``first_window`` = global index of row 0.

        Fast path (float32, ``atol > 0``): ``|Δ|/tol`` is screened in float32; when every element
        is below ``1 − FAST_MARGIN`` (float32 rounding is ~1e-7 relative, far inside the margin)
        the batch is inside tolerance and the sums are taken from the float32 ``|Δ|``. Any batch
        near or beyond the limit, non-finite or of another dtype is redone exactly in float64.
        """
        a, b = np.asarray(onnx_value), np.asarray(source)
        if a.shape != b.shape:
            raise ValueError(f"shape mismatch: onnx {a.shape} vs source {b.shape}")
        if a.size == 0:
            self.windows += a.shape[0] if a.ndim else 0
            return
        if not (a.dtype == b.dtype == np.float32 and self.atol > 0 and self._fast(a, b, first_window)):
            self._exact(a, b, first_window)
        if self.class_scores and a.ndim >= 2:
            self._update_top1(a, b, first_window)

    def _fast(self, a: np.ndarray[Any, Any], b: np.ndarray[Any, Any], first_window: int) -> bool:
        """The float32 path of :meth:`update`; False (nothing recorded) when the batch needs float64.

        The arrays are walked in slabs of whole windows (about ``SLAB_ELEMENTS`` each) so that a
        slab's passes — ``|Δ|``, ``|Δ|/tol``, ``|Δ|/max(|source|, REL_FLOOR)``, its bins and per-step
        maxima — reuse data still in the core's cache, and ``|source|`` is taken once for both
        quotients. Every read-out is the same float32 operation as on the whole batch, and maxima
        and counts do not depend on the order, so the results do not depend on the slab size
        (the sums are taken over the whole ``|Δ|`` afterwards). Without ``window_scores`` a slab's
        ``|Δ|/tol`` is computed only when the bound ``max |Δ| / atol`` does not already prove it
        below the screening limit (same decision, same statistics; ``window_max`` is None).
        """
        scan = self._scan_slabs(a, b)
        if scan is None:
            return False
        d, wmax, rel, counts, step_acc = scan
        n = d.shape[0]
        self.window_max = wmax
        self.windows += n
        self.count += d.size
        flat = d.reshape(-1)
        # float32 pairwise sum / BLAS dot: ~1e-6 relative, enough for a mean and an RMS
        self.sum_abs += float(flat.sum())
        self.sum_sq += float(np.dot(flat, flat))
        self.max_rel = max(self.max_rel, rel)
        for c in counts:
            self.hist[:c.size] += c
        smax = None
        if step_acc is not None:
            smax = step_acc.reshape(step_acc.shape[0], -1).max(axis=1).astype(np.float64)
        top = d.max() if smax is None else np.float32(smax.max())  # max is exact: same value either way
        self._update_worst_fast(d, a, b, first_window, top)
        if smax is not None:
            self._add_steps(smax, np.zeros(smax.size, np.int64))
        return True

    def _scan_slabs(self, a: np.ndarray[Any, Any], b: np.ndarray[Any, Any]) -> tuple[Any, ...] | None:
        """``(|Δ|, per-window max |Δ|/tol, max relative error, bin counts per slab, per-step max |Δ|
        or None)``, or None as soon as a slab holds a ratio ≥ ``1 − FAST_MARGIN`` or a non-finite one."""
        n = a.shape[0]
        k = max(1, min(n, SLAB_ELEMENTS // max(1, a.size // n)))  # windows per slab
        d = self._buf("d", a.shape)
        ratio, absb = self._buf("tol", (k, *a.shape[1:])), self._buf("absb", (k, *a.shape[1:]))
        idx = self._scratch.get("slab_idx")
        if idx is None or idx.size != ratio.size:
            idx = self._scratch["slab_idx"] = np.empty(ratio.size, np.intp)
        rtol, atol, floor = np.float32(self.rtol), np.float32(self.atol), np.float32(REL_FLOOR)
        limit = 1.0 - FAST_MARGIN
        wmax, rel = (np.empty(n, np.float32) if self.window_scores else None), 0.0
        counts: list[np.ndarray[Any, Any]] = []
        timed = self.time_indexed and a.ndim >= 2
        step_acc = None
        with np.errstate(invalid="ignore", over="ignore"):
            for s in range(0, n, k):
                e = min(n, s + k)
                ds, rs, bs = d[s:e], ratio[:e - s], absb[:e - s]
                np.subtract(a[s:e], b[s:e], out=ds)
                np.abs(ds, out=ds)
                np.abs(b[s:e], out=bs)
                smax = ds.max(axis=0) if timed else None
                # |Δ|/tol ≤ |Δ|/atol (tol ≥ atol after float32 rounding too: IEEE-754 rounding is
                # monotonic); the 2⁻²⁰ covers the quotient's rounding. Below the limit, the exact
                # screen would pass as well, so only window scores need the quotient then.
                top = float(ds.max() if smax is None else smax.max())
                if wmax is not None or not top / float(atol) * (1.0 + 2.0**-20) < limit:
                    wm = wmax[s:e] if wmax is not None else np.empty(e - s, np.float32)
                    np.multiply(bs, rtol, out=rs)
                    rs += atol
                    np.divide(ds, rs, out=rs)
                    np.max(rs.reshape(e - s, -1), axis=1, out=wm)
                    if not wm.max() < limit:  # also catches NaN
                        return None
                np.maximum(bs, floor, out=bs)
                rel = max(rel, float(np.divide(ds, bs, out=bs).max()))
                ix = idx[:ds.size]
                np.right_shift(ds.reshape(-1).view(np.int32), HIST_SHIFT, out=ix)  # bincount's index type
                counts.append(np.bincount(ix))
                if smax is not None:
                    step_acc = smax if step_acc is None else np.maximum(step_acc, smax, out=step_acc)
        return d, wmax, rel, counts, step_acc

    def _update_worst_fast(self, d: np.ndarray[Any, Any], a: np.ndarray[Any, Any], b: np.ndarray[Any, Any],
                           first_window: int, top: Any) -> None:
        """The largest |Δ| of a float32 batch (``top`` = its float32 maximum), recomputed in float64
        (same result as :meth:`_update_worst` with ``exact=True``, searching only the windows that
        can hold it)."""
        if self.worst is not None and float(top) * (1.0 + 2.0**-20) <= self.max_abs:
            return  # nothing in this batch can beat the maximum so far (float32 rounding margin)
        n = d.shape[0]
        per_window = d.reshape(n, -1).max(axis=1)
        rows = np.flatnonzero(per_window >= top * np.float32(1.0 - 2.0**-20))
        self._update_worst(d[rows], a[rows], b[rows], first_window, exact=True, rows=rows)

    def _exact(self, a: np.ndarray[Any, Any], b: np.ndarray[Any, Any], first_window: int) -> None:
        d = abs_error(a, b)
        absb = np.abs(np.asarray(b, dtype=np.float64))
        tol = self.atol + self.rtol * absb
        bad = ~within_tolerance(a, b, self.atol, self.rtol)
        n = d.shape[0]
        self.windows += n
        self.count += d.size
        self.outside += int(np.count_nonzero(bad))
        finite = bool(np.isfinite(d).all())
        self.sum_abs += float(d.sum()) if finite else math.inf
        self.sum_sq += float(np.dot(d.reshape(-1), d.reshape(-1))) if finite else math.inf
        self._update_worst(d, a, b, first_window)
        with np.errstate(invalid="ignore"):
            rel = d / np.maximum(absb, REL_FLOOR)
        self.max_rel = max(self.max_rel, float(np.nanmax(rel)))
        self._update_hist(d.astype(np.float32))
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(d == 0, 0.0, d / tol)
        self.window_max = ratio.reshape(n, -1).max(axis=1)
        if self.time_indexed and d.ndim >= 2:
            self._update_steps(d, bad)

    def _update_worst(self, d: np.ndarray[Any, Any], a: np.ndarray[Any, Any], b: np.ndarray[Any, Any],
                      first_window: int, exact: bool = False, rows: np.ndarray[Any, Any] | None = None) -> None:
        """Track the largest |Δ|; ``exact``: recompute it in float64 at the float32 argmax.
        ``rows``: the arrays are these windows of the batch (row i is window ``rows[i]``)."""
        flat = int(np.argmax(d))
        if exact:
            # float32 |Δ| can tie or round across elements whose float64 |Δ| differ: recompute every
            # element within float32 rounding of the maximum in float64 and take the largest.
            top = d.reshape(-1)[flat]
            cand = np.flatnonzero(d.reshape(-1) >= top * np.float32(1.0 - 2.0**-20))
            ex = np.abs(np.asarray(a).reshape(-1)[cand].astype(np.float64)
                        - np.asarray(b).reshape(-1)[cand].astype(np.float64))
            k = int(np.argmax(ex))
            flat, m = int(cand[k]), float(ex[k])
        else:
            m = float(d.flat[flat])
        if self.worst is None or m > self.max_abs:
            self.max_abs = m
            idx = np.unravel_index(flat, d.shape)
            step = int(idx[1]) if self.time_indexed and d.ndim >= 2 else None
            rest = tuple(int(i) for i in (idx[2:] if step is not None else idx[1:]))
            window = int(idx[0]) if rows is None else int(rows[idx[0]])
            self.worst = (first_window + window, step, rest)
            self.worst_source = float(np.asarray(b).flat[flat])
            self.worst_onnx = float(np.asarray(a).flat[flat])

    def _update_hist(self, d32: np.ndarray[Any, Any]) -> None:
        """Bin float32 ``|Δ| ≥ 0`` by its bit pattern (monotonic for non-negative floats)."""
        bits = np.ascontiguousarray(d32).reshape(-1).view(np.int32)
        idx = self._scratch.get("hist_idx")
        if idx is None or idx.shape != bits.shape:
            idx = self._scratch["hist_idx"] = np.empty(bits.shape, np.intp)
        np.right_shift(bits, HIST_SHIFT, out=idx)  # already bincount's index type: no copy inside
        self.hist += np.bincount(idx, minlength=HIST_BINS)

    def _update_steps(self, d: np.ndarray[Any, Any], bad: np.ndarray[Any, Any] | None) -> None:
        n, t = d.shape[0], d.shape[1]
        smax = d.max(axis=0).reshape(t, -1).max(axis=1).astype(np.float64)
        if bad is None:
            sout = np.zeros(t, np.int64)
        else:
            sout = np.count_nonzero(bad.reshape(n, t, -1), axis=(0, 2)).astype(np.int64)
        self._add_steps(smax, sout)

    def _add_steps(self, smax: np.ndarray[Any, Any], sout: np.ndarray[Any, Any]) -> None:
        """Fold one batch's per-step max |Δ| and count outside into the curves."""
        if self.step_max is None or self.step_outside is None:
            self.step_max, self.step_outside = smax, sout
            return
        self.step_max, self.step_outside = merge_steps(self.step_max, self.step_outside, smax, sout)

    def _update_top1(self, a: np.ndarray[Any, Any], b: np.ndarray[Any, Any], first_window: int) -> None:
        if a.shape[-1] == 1:  # one sigmoid unit: the label is score > 0.5
            la, lb = a[..., 0] > 0.5, b[..., 0] > 0.5
        else:
            la, lb = np.argmax(a, axis=-1), np.argmax(b, axis=-1)
        same = la == lb
        self.top1_agree += int(same.sum())
        self.top1_total += same.size
        flipped = np.nonzero(~same.reshape(same.shape[0], -1).all(axis=1))[0]
        self.flips += len(flipped)
        room = MAX_FLIPS_LISTED - len(self.flip_windows)
        self.flip_windows.extend(int(first_window + i) for i in flipped[:max(room, 0)])

    # ----- read-outs ------------------------------------------------------------------------
    @property
    def passed(self) -> bool:
        return self.outside == 0

    def p99_abs(self) -> float:
        """Upper edge of the histogram bin holding the 99th percentile (see module docstring)."""
        if self.count == 0 or self.max_abs == 0.0:
            return 0.0
        rank = math.ceil(0.99 * (self.count - 1)) + 1  # 1-based rank numpy's method="higher" picks
        k = int(np.searchsorted(np.cumsum(self.hist), rank, side="left"))
        return _bin_upper_edge(k)

    def first_bad_step(self) -> int | None:
        if self.step_outside is None:
            return None
        bad = np.nonzero(self.step_outside)[0]
        return int(bad[0]) if len(bad) else None

    def metrics(self) -> dict[str, Any]:
        """JSON-ready metrics (non-finite errors stay ``inf``; the JSON writer spells them out)."""
        n = max(self.count, 1)
        out: dict[str, Any] = {
            "elements": self.count,
            "windows": self.windows,
            "max_abs": _num(self.max_abs),
            "max_rel": _num(self.max_rel),
            "mean_abs": _num(self.sum_abs / n),
            # the histogram's upper bin edge can pass the exact maximum; a percentile never does
            "p99_abs": _num(min(self.p99_abs(), self.max_abs)),
            "rms": _num(math.sqrt(self.sum_sq / n)),
            "outside": self.outside,
            "outside_fraction": self.outside / n,
            "worst": None,
        }
        if self.worst is not None:
            w, s, idx = self.worst
            out["worst"] = {"window": w, "step": s, "index": list(idx),
                            "source": _num(self.worst_source), "onnx": _num(self.worst_onnx)}
        if self.step_max is not None:
            first, last = float(self.step_max[0]), float(self.step_max[-1])
            out["drift_first"] = _num(first)
            out["drift_last"] = _num(last)
            out["drift_growth"] = _num(last / first) if first > 0 else None
            out["first_bad_step"] = self.first_bad_step()
        if self.top1_total:
            out["top1_agreement"] = self.top1_agree / self.top1_total
            out["label_flips"] = self.flips
            out["flip_windows"] = list(self.flip_windows)
        return out

    def per_step_max_abs(self) -> list[float] | None:
        return None if self.step_max is None else [_num(float(v)) for v in self.step_max]


def merge_steps(amax: np.ndarray[Any, Any], aout: np.ndarray[Any, Any], bmax: np.ndarray[Any, Any],
                bout: np.ndarray[Any, Any]) -> tuple[np.ndarray[Any, Any], np.ndarray[Any, Any]]:
    """Elementwise max / sum of two per-step curves; a shorter curve covers only its prefix."""
    n = max(len(amax), len(bmax))
    m = np.zeros(n, np.float64)
    o = np.zeros(n, np.int64)
    for cmax, cout in ((amax, aout), (bmax, bout)):
        m[: len(cmax)] = np.maximum(m[: len(cmax)], cmax)
        o[: len(cout)] += cout
    return m, o


def merge_stats(parts: list[TensorStats]) -> TensorStats:
    """Combine the stats of one tensor over several recordings (window indices stay per part)."""
    first = parts[0]
    out = TensorStats(first.atol, first.rtol, first.time_indexed, first.class_scores)
    for p in parts:
        out.count += p.count
        out.windows += p.windows
        out.outside += p.outside
        out.sum_abs += p.sum_abs
        out.sum_sq += p.sum_sq
        out.max_rel = max(out.max_rel, p.max_rel)
        out.hist = out.hist + p.hist
        if p.worst is not None and (out.worst is None or p.max_abs > out.max_abs):
            out.max_abs, out.worst = p.max_abs, p.worst
            out.worst_source, out.worst_onnx = p.worst_source, p.worst_onnx
        if p.step_max is not None and p.step_outside is not None:
            if out.step_max is None or out.step_outside is None:
                out.step_max, out.step_outside = p.step_max.copy(), p.step_outside.copy()
            else:
                out.step_max, out.step_outside = merge_steps(out.step_max, out.step_outside,
                                                             p.step_max, p.step_outside)
        out.top1_agree += p.top1_agree
        out.top1_total += p.top1_total
        out.flips += p.flips
    return out


def merge_shards(parts: list[TensorStats]) -> TensorStats:
    """Combine the stats of one tensor over consecutive window ranges of ONE recording, given in
    recording order: the result is what one pass over all the windows gives — counts, maxima,
    the worst element (ties: the earliest window), the histogram (so ``p99_abs``) and the
    per-step curves exactly; the first ``MAX_FLIPS_LISTED`` flipped windows; ``mean_abs`` and
    ``rms`` up to the order of floating-point summation (~1e-7 relative)."""
    out = merge_stats(parts)
    for p in parts:
        room = MAX_FLIPS_LISTED - len(out.flip_windows)
        out.flip_windows.extend(p.flip_windows[:max(room, 0)])
    return out


def _num(x: float | None) -> float | None:
    """A plain float; NaN becomes None (errors are never NaN: NaN differences count as +Inf)."""
    if x is None or math.isnan(x):
        return None
    return float(x)
