"""Synthetic stress windows (``--synthetic``), seeded, each kind its own recording set.

For every input, with per-feature mean ``μ`` and std ``σ`` of the recording (``σ = 1`` where a
feature is constant; ``μ = 0, σ = 1`` when there is no recording):

- ``synthetic:scaled``   — ``N(μ, σ²)`` per element, the recording's window shape;
- ``synthetic:zeros``    — all zeros;
- ``synthetic:constants``— window ``i`` constant at ``μ + c_i·σ``, ``c_i`` evenly in ``[−3, 3]``;
- ``synthetic:extremes`` — every element ``μ ± 6σ`` (random sign); windows 0 and 1 are all
  ``+6σ`` and all ``−6σ``;
- ``synthetic:long``     — ``N(μ, σ²)`` with 4× the recorded steps, only when the model's time
  axis is dynamic (inputs sharing that symbolic dim all get 4×).

Integer inputs (token ids) use the recorded range ``[low, high]`` instead: uniform ids,
zeros, constant ids spread over the range, and ``low``/``high`` at random as extremes.
Each set draws from its own stream ``default_rng([seed, k])`` so sets are reproducible alone.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from seqgate.verify.recordings import FeatureStats, InputSpec, MappedArray, Recording

SYNTHETIC_WINDOWS = 32
DEFAULT_STEPS = 16  # window length when there is no recording and the time axis is dynamic
KINDS = ("scaled", "zeros", "constants", "extremes", "long")


def _default_stats(spec: InputSpec) -> FeatureStats:
    shape = tuple(d if isinstance(d, int) else (DEFAULT_STEPS if i == 1 and spec.is_sequence else 1)
                  for i, d in enumerate(spec.window_dims))[1:]
    f = shape[-1] if shape else 1
    return FeatureStats(np.zeros(f), np.ones(f), np.zeros(f), np.ones(f), shape)


def _draw(kind: str, spec: InputSpec, st: FeatureStats, shape: tuple[int, ...],
          rng: np.random.Generator) -> np.ndarray[Any, Any]:
    n = shape[0]
    mu, sigma = st.mean, np.where(st.std > 0, st.std, 1.0)
    if spec.dtype.kind in "iu":
        # one id range for the whole input: token ids are not per-feature quantities
        lo, hi = int(np.floor(np.min(st.low))), int(np.ceil(np.max(st.high)))
        if kind in ("scaled", "long"):
            x = rng.integers(lo, hi + 1, size=shape)
        elif kind == "zeros":
            x = np.zeros(shape)
        elif kind == "constants":
            x = np.broadcast_to(np.round(np.linspace(lo, hi, n)).reshape((n,) + (1,) * (len(shape) - 1)), shape)
        else:
            x = np.where(rng.random(shape) < 0.5, lo, hi)
        return np.asarray(x).astype(spec.dtype)
    if kind in ("scaled", "long"):
        x = mu + sigma * rng.standard_normal(shape)
    elif kind == "zeros":
        x = np.zeros(shape)
    elif kind == "constants":
        c = np.linspace(-3.0, 3.0, n).reshape((n,) + (1,) * (len(shape) - 1))
        x = np.broadcast_to(mu + c * sigma, shape)  # every step of window i at the same value
    else:
        sign = np.where(rng.random(shape) < 0.5, -1.0, 1.0)
        sign[0] = 1.0
        if n > 1:
            sign[1] = -1.0
        x = mu + 6.0 * sigma * sign
    return np.asarray(x, dtype=np.float64).astype(spec.dtype)


def synthetic_sets(specs: list[InputSpec], stats: dict[str, FeatureStats] | None, seed: int,
                   windows: int = SYNTHETIC_WINDOWS) -> list[Recording]:
    """One :class:`Recording` per synthetic kind (``long`` only for a dynamic time axis)."""
    per = {s.name: (stats or {}).get(s.name) or _default_stats(s) for s in specs}
    long_dims = {s.window_dims[1] for s in specs if s.time_dynamic}
    out = []
    for k, kind in enumerate(KINDS):
        if kind == "long" and not long_dims:
            continue
        rng = np.random.default_rng([seed, k])
        arrays = {}
        for s in specs:
            shape = (windows, *per[s.name].shape)
            if kind == "long" and s.time_dynamic and s.window_dims[1] in long_dims:
                shape = (windows, 4 * shape[1], *shape[2:])
            x = _draw(kind, s, per[s.name], shape, rng)
            arrays[s.name] = MappedArray(x, f"synthetic:{kind} {s.name!r}")
        notes = {"seed": seed, "scale": "recording" if stats else "unit (no recording)"}
        out.append(Recording(f"synthetic:{kind}", f"synthetic:{kind}", dict(arrays), windows, notes=notes))
    return out
