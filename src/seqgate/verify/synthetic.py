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

The time axis of an input is the dim whose symbolic name contains ``time`` wherever it sits
(channels-first ``[batch, features, time]`` models, e.g. ones starting with a Conv1d), else
axis 1 of a sequence input; without a recording it gets ``DEFAULT_STEPS`` steps.

Padded models (ONNX metadata ``seqgate.padding``, written at export): a lengths input gets the
full window length in the sets above, and padded sets are added (their notes count the padded
steps): ``synthetic:padded_random_lengths`` (right padding, lengths uniform in 1..T),
``synthetic:padded_left`` and ``synthetic:padded_holes`` where the model's masking allows
them (Keras masks), ``synthetic:padded_all`` (every step padded; only where a length of 0 is
valid: not for PyTorch packing, which refuses it) and ``synthetic:padded_length_1``. Padded
steps hold the padding value (a ``value`` entry) or zeros beyond the length (a ``lengths``
entry); valid integer steps never hold the padding id.

Integer inputs (token ids) use the recorded range ``[low, high]`` instead: uniform ids,
zeros, constant ids spread over the range, and ``low``/``high`` at random as extremes. An
integer input with a declared range (ONNX metadata ``seqgate.input_ranges``, from
``--input NAME:DIMS:int64=LOW..HIGH``) uses that range, its bounds resolved at the set's dim
sizes (``1..time`` never exceeds the set's window length, 4× in the long set), and its
"zeros" are the range's value nearest zero; bool inputs draw 0/1.

Dims written ``NAME+K``/``NAME-K`` (``seqgate.util.dims``) keep their relation in every set:
NAME's size plus/minus K (:func:`set_shapes`).
Each set draws from its own stream ``default_rng([seed, k])`` so sets are reproducible alone.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from seqgate.util.dims import resolve, split_dim
from seqgate.verify.recordings import FeatureStats, InputSpec, MappedArray, Recording

SYNTHETIC_WINDOWS = 32
DEFAULT_STEPS = 16  # window length when there is no recording and the time axis is dynamic
KINDS = ("scaled", "zeros", "constants", "extremes", "long")


def time_axis(spec: InputSpec) -> int | None:
    """The time axis of ``spec``'s window layout: the dim whose symbolic name contains ``time``
    (channels-first ``[batch, features, time]`` has it at axis 2), else axis 1 of a sequence
    input, else None."""
    for i, d in enumerate(spec.window_dims):
        if i and isinstance(d, str) and "time" in d:
            return i
    return 1 if spec.is_sequence else None


def _time_dynamic(spec: InputSpec) -> bool:
    t = time_axis(spec)
    return t is not None and not isinstance(spec.window_dims[t], int)


def _default_stats(spec: InputSpec) -> FeatureStats:
    t = time_axis(spec)
    shape = tuple(d if isinstance(d, int) else (DEFAULT_STEPS if i == t else 1)
                  for i, d in enumerate(spec.window_dims))[1:]
    f = shape[-1] if shape else 1
    return FeatureStats(np.zeros(f), np.ones(f), np.zeros(f), np.ones(f), shape)


def _draw(kind: str, spec: InputSpec, st: FeatureStats, shape: tuple[int, ...],
          rng: np.random.Generator, bounds: tuple[int, int] | None = None) -> np.ndarray[Any, Any]:
    n = shape[0]
    mu, sigma = st.mean, np.where(st.std > 0, st.std, 1.0)
    if mu.shape[-1:] != shape[-1:]:  # channels-first: the last axis is time, stats are per step
        mu, sigma = np.mean(mu), np.mean(sigma)
    if spec.dtype.kind in "iub":
        # one id range for the whole input: token ids are not per-feature quantities
        lo, hi = bounds or (int(np.floor(np.min(st.low))), int(np.ceil(np.max(st.high))))
        if spec.dtype.kind == "b":
            lo, hi = 0, 1
        if kind in ("scaled", "long"):
            x = rng.integers(lo, hi + 1, size=shape)
        elif kind == "zeros":
            # a declared range's value nearest zero (a length of 0 may be invalid); else zeros
            x = np.full(shape, min(max(0, lo), hi)) if bounds else np.zeros(shape)
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


def set_shapes(specs: list[InputSpec], per: dict[str, FeatureStats],
               long: bool) -> tuple[dict[str, tuple[int, ...]], dict[str, int]]:
    """One window's shape per input in a set, and the size of every plain symbolic dim.

    A symbol takes the size the statistics (the recording, or ``DEFAULT_STEPS`` for time) give
    it; a dim ``NAME+K``/``NAME-K`` (``seqgate.util.dims``) is NAME's size plus/minus K, NAME
    raised when needed so that it is at least 1; in the ``long`` set every symbol at a dynamic
    time axis is 4× (its expressions follow)."""
    sizes: dict[str, int] = {}
    exprs: list[tuple[str, int, int]] = []
    for s in specs:
        for axis, d in enumerate(s.window_dims[1:]):
            if isinstance(d, str):
                base, offset = split_dim(d)
                if offset:
                    exprs.append((base, offset, per[s.name].shape[axis]))
                else:
                    sizes.setdefault(base, per[s.name].shape[axis])
    for base, offset, own in exprs:
        sizes.setdefault(base, own - offset)
        sizes[base] = max(sizes[base], 1 - offset)
    if long:
        for base in {split_dim(d)[0] for s in specs if _time_dynamic(s)
                     for d in [s.window_dims[time_axis(s) or 1]] if isinstance(d, str)}:
            sizes[base] *= 4
    shapes = {}
    for s in specs:
        t = time_axis(s)
        shapes[s.name] = tuple(
            resolve(d, sizes) if isinstance(d, str) else
            4 * size if long and d is None and i + 1 == t else size
            for i, (d, size) in enumerate(zip(s.window_dims[1:], per[s.name].shape, strict=True)))
    return shapes, sizes


def value_bounds(ranges: dict[str, dict[str, Any]], name: str, sizes: dict[str, int]) -> tuple[int, int] | None:
    """An integer input's declared range (``seqgate.input_ranges``) at this set's dim sizes."""
    entry = ranges.get(name)
    if entry is None:
        return None
    low, high = resolve(entry["low"], sizes), resolve(entry["high"], sizes)
    if low is None or high is None or low > high:
        return None
    return low, high


def synthetic_sets(specs: list[InputSpec], stats: dict[str, FeatureStats] | None, seed: int,
                   windows: int = SYNTHETIC_WINDOWS,
                   padding: list[dict[str, Any]] | None = None,
                   ranges: dict[str, dict[str, Any]] | None = None) -> list[Recording]:
    """One :class:`Recording` per synthetic kind (``long`` only for a dynamic time axis), then
    the padded sets of ``padding`` (module docstring); integer inputs in ``ranges``
    (``seqgate.input_ranges``) are drawn in their declared range."""
    per = {s.name: (stats or {}).get(s.name) or _default_stats(s) for s in specs}
    has_long = any(_time_dynamic(s) for s in specs)
    out = []
    for k, kind in enumerate(KINDS):
        if kind == "long" and not has_long:
            continue
        rng = np.random.default_rng([seed, k])
        shapes, sizes = set_shapes(specs, per, kind == "long")
        arrays = {}
        for s in specs:
            bounds = value_bounds(ranges or {}, s.name, sizes)
            x = _draw(kind, s, per[s.name], (windows, *shapes[s.name]), rng, bounds)
            arrays[s.name] = MappedArray(x, f"synthetic:{kind} {s.name!r}")
        _full_lengths(arrays, padding or [], f"synthetic:{kind}")
        notes = {"seed": seed, "scale": "recording" if stats else "unit (no recording)"}
        out.append(Recording(f"synthetic:{kind}", f"synthetic:{kind}", dict(arrays), windows, notes=notes))
    if padding:
        out += padded_sets(specs, per, padding, seed, windows, stats is not None, ranges or {})
    return out


def scaled_windows(specs: list[InputSpec], stats: dict[str, FeatureStats] | None, seed: int, windows: int,
                   steps: int) -> dict[str, np.ndarray[Any, Any]]:
    """``synthetic:scaled`` windows (module docstring) with ``steps`` steps along every input's
    time axis, from their own stream ``default_rng([seed, 200])`` (the long-stream check's input)."""
    per = {s.name: (stats or {}).get(s.name) or _default_stats(s) for s in specs}
    rng = np.random.default_rng([seed, 200])
    out = {}
    for s in specs:
        shape = (windows, *per[s.name].shape)
        t = time_axis(s)
        if t is not None:
            shape = (*shape[:t], steps, *shape[t + 1:])
        out[s.name] = _draw("scaled", s, per[s.name], shape, rng)
    return out


def steps_exercised(specs: list[InputSpec], recs: list[Recording]) -> int | None:
    """The longest time axis any set feeds to any input that has one (None: no input has one)."""
    longest: int | None = None
    for s in specs:
        t = time_axis(s)
        if t is None:
            continue
        for r in recs:
            a = r.arrays.get(s.name)
            if a is not None and len(a.shape) > t:
                longest = max(longest or 0, int(a.shape[t]))
    return longest


def require_steps(specs: list[InputSpec], recs: list[Recording]) -> None:
    """Exit 2 when every set feeds fewer than 2 time steps: recurrence would go untested."""
    from seqgate.errors import BadInputError

    steps = steps_exercised(specs, recs)
    if steps is None or steps >= 2:
        return
    named = ", ".join(f"{s.name} [{', '.join(str(d) for d in s.window_dims)}] time axis {time_axis(s)}"
                      for s in specs if time_axis(s) is not None)
    raise BadInputError(
        f"this verification would run only {steps} time step (inputs: {named}), so the recurrent "
        f"state is never carried from one step to the next and a pass would prove nothing. Give "
        f"recorded windows of at least 2 steps, or export the model with a time axis named time "
        f"(e.g. --input x:batch,8,time for a channels-first model) so --synthetic can make "
        f"windows of real length.")


def _full_lengths(arrays: dict[str, MappedArray], padding: list[dict[str, Any]], label: str) -> None:
    """A lengths input of an unpadded set: every window at its full length."""
    for entry in padding:
        if entry.get("kind") != "lengths" or entry["lengths"] not in arrays:
            continue
        seq = next((arrays[n].array for n in entry.get("inputs", []) if n in arrays), None)
        if seq is None:
            continue
        lengths = np.full(seq.shape[0], seq.shape[1], dtype=arrays[entry["lengths"]].dtype)
        arrays[entry["lengths"]] = MappedArray(lengths, f"{label} {entry['lengths']!r}")


PADDED = ("random_lengths", "left", "holes", "all", "length_1")
_NEEDS = {"left": "left", "holes": "holes"}


def _pattern(kind: str, n: int, t: int, rng: np.random.Generator) -> np.ndarray[Any, Any]:
    """Valid-step mask ``[n, t]`` of one padded kind."""
    steps = np.arange(t)[None]
    if kind == "random_lengths":
        return steps < rng.integers(1, t + 1, size=n)[:, None]
    if kind == "left":
        return steps >= t - rng.integers(1, t + 1, size=n)[:, None]
    if kind == "holes":
        m = rng.random((n, t)) < 0.6
        m[np.arange(n), rng.integers(0, t, size=n)] = True  # at least one valid step per window
        return m
    if kind == "all":
        return np.zeros((n, t), dtype=bool)
    return np.broadcast_to(steps < 1, (n, t)).copy()  # length_1


def padded_sets(specs: list[InputSpec], per: dict[str, FeatureStats], padding: list[dict[str, Any]],
                seed: int, windows: int, recorded: bool,
                ranges: dict[str, dict[str, Any]] | None = None) -> list[Recording]:
    """The padded synthetic sets (module docstring); one mask per set, shared by every entry."""
    out = []
    shapes, sizes = set_shapes(specs, per, False)
    for k, kind in enumerate(PADDED):
        allowed = [e for e in padding if _NEEDS.get(kind, "right") in e.get("patterns", ["right"])
                   and not (kind == "all" and int(e.get("min_length", 1)) > 0)]
        if not allowed:
            continue
        rng = np.random.default_rng([seed, 100 + k])
        arrays = {s.name: MappedArray(_draw("scaled", s, per[s.name], (windows, *shapes[s.name]), rng,
                                            value_bounds(ranges or {}, s.name, sizes)),
                                      f"synthetic:padded_{kind} {s.name!r}") for s in specs}
        seq = next((s for s in specs if s.is_sequence), None)
        if seq is None:
            continue
        mask = _pattern(kind, windows, shapes[seq.name][0], rng)
        for entry in allowed:
            _apply(arrays, entry, mask, f"synthetic:padded_{kind}")
        notes = {"seed": seed, "scale": "recording" if recorded else "unit (no recording)",
                 "padding_steps": int((~mask).sum()), "steps": int(mask.size)}
        out.append(Recording(f"synthetic:padded_{kind}", f"synthetic:padded_{kind}", arrays, windows,
                             notes=notes))
    return out


def _apply(arrays: dict[str, MappedArray], entry: dict[str, Any], mask: np.ndarray[Any, Any],
           label: str) -> None:
    """Write one padding entry's padded steps (or lengths) into the set's arrays."""
    if entry.get("kind") == "lengths":
        name = entry["lengths"]
        if name in arrays:
            arrays[name] = MappedArray(mask.sum(axis=1).astype(arrays[name].dtype), f"{label} {name!r}")
        names, value = entry.get("inputs", []), 0
    else:
        names, value = [entry["input"]], entry["value"]
    for name in names:
        if name not in arrays or arrays[name].array.shape[1] != mask.shape[1]:
            continue
        x = np.array(arrays[name].array)
        m = mask.reshape(mask.shape + (1,) * (x.ndim - 2))
        if x.dtype.kind in "iu":
            x = np.where(x == value, value + 1, x)  # a valid step never holds the padding id
        x = np.where(m, x, np.asarray(value, dtype=x.dtype)).astype(x.dtype)
        arrays[name] = MappedArray(x, f"{label} {name!r}")


def read_padding(model: Any) -> list[dict[str, Any]]:
    """The ``seqgate.padding`` entries of an exported ONNX model ([] when it has none)."""
    import json

    for p in model.metadata_props:
        if p.key == "seqgate.padding":
            return list(json.loads(p.value))
    return []
