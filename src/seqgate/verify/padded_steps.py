"""Which steps of a recording are padding, read from the model's ``seqgate.padding`` record.

The rule per padding entry (written at export, see ``verify.synthetic``):

- ``{"kind": "lengths", "lengths": L, "inputs": [X, ...]}``: window n has ``L[n]`` valid steps
  at the front (right padding), the rest of the first sequence input X's ``T`` steps are padding;
  a length outside ``0..T`` is refused (ONNX Runtime would fail on it, without naming the window);
- ``{"kind": "value", "input": X, "value": v}``: step t of window n is padding when every
  element of ``X[n, t, ...]`` equals ``v`` (Keras ``Masking``: all features; an id input of
  ``Embedding(mask_zero=True)``: the id itself) — any pattern, holes included.

A set's count sums over the entries the recording has arrays for: ``steps`` = Σ windows × T,
``padding_steps`` = Σ padded steps. Arrays are read one slice of windows at a time, so a large
recording is never held whole.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from seqgate.errors import BadInputError
from seqgate.verify.recordings import LazyArray, Recording

CHUNK = 4096  # windows read at once


def entry_arrays(arrays: Mapping[str, LazyArray],
                 entry: dict[str, Any]) -> tuple[LazyArray, LazyArray | None] | None:
    """``(sequence array, lengths array or None)`` of one entry, or ``None`` when the set lacks them."""
    if entry.get("kind") == "lengths":
        seq = next((arrays[n] for n in entry.get("inputs", []) if n in arrays), None)
        lengths = arrays.get(entry.get("lengths", ""))
        return None if seq is None or lengths is None else (seq, lengths)
    seq = arrays.get(entry.get("input", ""))
    return None if seq is None else (seq, None)


def valid_mask(seq: np.ndarray[Any, Any], lengths: np.ndarray[Any, Any] | None, entry: dict[str, Any],
               label: str = "", first: int = 0) -> np.ndarray[Any, Any]:
    """Valid steps ``[windows, T]`` (bool) of one slice of windows (module docstring)."""
    t = seq.shape[1]
    if lengths is not None:
        lengths = np.asarray(lengths).reshape(-1)
        bad = np.flatnonzero((lengths < 0) | (lengths > t))
        if bad.size:
            raise BadInputError(
                f"{label}: window {first + int(bad[0])} has length {int(lengths[bad[0]])}, outside 0..{t} "
                f"(the windows hold {t} steps). Lengths count the valid steps at the front of a window; "
                f"fix the array {entry.get('lengths')!r} and record again.")
        return np.arange(t)[None, :] < lengths[:, None]
    padded = seq == np.asarray(entry["value"], dtype=seq.dtype)
    if seq.ndim > 2:
        padded = padded.all(axis=tuple(range(2, seq.ndim)))
    return ~padded


def window_lengths(arrays: Mapping[str, LazyArray], entry: dict[str, Any],
                   label: str) -> np.ndarray[Any, Any] | None:
    """Valid steps per window (``[windows]`` int64) of one entry, or ``None`` without its arrays."""
    found = entry_arrays(arrays, entry)
    if found is None:
        return None
    seq, lengths = found
    out = []
    for start in range(0, seq.shape[0], CHUNK):
        stop = min(start + CHUNK, seq.shape[0])
        lens = None if lengths is None else lengths.read(start, stop)
        out.append(valid_mask(seq.read(start, stop), lens, entry, label, start).sum(axis=1))
    return np.concatenate(out).astype(np.int64) if out else np.zeros(0, np.int64)


def count_padding(rec: Recording, padding: list[dict[str, Any]]) -> dict[str, int] | None:
    """``{"padding_steps", "steps"}`` of a recording (module docstring); ``None`` when no entry applies."""
    padded = steps = 0
    applied = False
    for entry in padding:
        found = entry_arrays(rec.arrays, entry)
        lengths = window_lengths(rec.arrays, entry, rec.label)
        if found is None or lengths is None:
            continue
        t = int(found[0].shape[1])
        applied = True
        steps += int(lengths.size) * t
        padded += int(lengths.size) * t - int(lengths.sum())
    return {"padding_steps": padded, "steps": steps} if applied else None


def add_padding_counts(recs: list[Recording], padding: list[dict[str, Any]]) -> None:
    """Note the padding counts of each recorded set (synthetic sets carry their own)."""
    for rec in recs:
        if rec.kind != "recorded" or not padding:
            continue
        counts = count_padding(rec, padding)
        if counts is not None:
            rec.notes.update(counts)
