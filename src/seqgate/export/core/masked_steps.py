"""Exact masked recurrence on a native ONNX node, for ANY mask (right/left padding, holes).

ONNX ``sequence_lens`` only says "the first ``len`` steps of each row are valid" (right
padding). A Keras mask may mark any set of steps. The general form used here:

1. **Compact** — per row, the valid positions in time order, then the masked ones:
   ``key[n, t] = t + T·(1 − m[n, t])``, ``perm = argsort(key)`` (TopK, smallest first; the
   keys are distinct, so the order is unique: a stable sort of positions by mask).
   ``x_c[n, j] = x[n, perm[n, j]]`` (GatherND, ``batch_dims=1``); ``count[n] = Σ_t m[n, t]``.
2. **Run** the native node on ``x_c`` with ``sequence_lens = count`` (int32). Forward: compact
   output j is the state after the (j+1)-th valid step; reverse: the state after consuming
   valid steps count−1 … j, i.e. Keras's ``go_backwards`` order over the valid steps.
3. **Expand** back to positions with a gather (no scatter needed). With ``c[t] = Σ_{s≤t} m[s]``:

   - forward, "repeat previous output": ``out[t] = y_c[c[t] − 1]`` if ``c[t] > 0`` else 0
     (a masked step repeats the last valid output; zeros before the first valid step);
   - reverse (processing from the end), "repeat": ``out[t] = y_c[c[t] − m[t]]`` if
     ``c[t] − m[t] < count`` else 0 (the nearest valid step at or after t);
   - "zero output for mask": the same index, valid only where ``m[t]``.

Keras's masked RNN loop (``keras.src.backend.tensorflow.rnn``: ``output = where(mask_t,
output, prev_output)``, states ``where(mask_t, new, old)``, ``last_output = outputs[-1]``)
is what these rules reproduce. Final states: ONNX ``Y_h`` is the state after the last valid
step; for ``count = 0`` ONNX gives zeros where Keras keeps the initial state, so callers with
an initial state use :func:`keep_initial`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from seqgate.export.core.builder import INT32, INT64, GraphBuilder


@dataclass(frozen=True)
class StepOrder:
    """ONNX values describing one mask ``[N, T]`` (see module docstring)."""

    perm: str  # [N, T] int64: valid positions first, in time order
    count: str  # [N] int64
    count_i32: str  # [N] int32, for sequence_lens
    cum: str  # [N, T] int64, inclusive cumulative count of valid steps
    mask_i64: str  # [N, T] int64 (1 valid, 0 masked)
    mask_bool: str  # [N, T] bool


def step_order(b: GraphBuilder, mask_nt: str) -> StepOrder:
    """Compaction order, counts and cumulative counts of a boolean (or 0/1) mask ``[N, T]``."""
    m_bool = b.op("Cast", [mask_nt], to=9)  # TensorProto.BOOL: any nonzero is valid
    m = b.op("Cast", [m_bool], to=INT64)
    t_len = b.op("Shape", [mask_nt], start=1, end=2)  # [1]
    t_scalar = b.squeeze(t_len, [0])
    positions = b.op("Range", [b.const(np.asarray(0, np.int64), "zero"), t_scalar,
                               b.const(np.asarray(1, np.int64), "one")])
    masked = b.op("Sub", [b.const(np.asarray(1, np.int64), "one"), m])
    key = b.op("Add", [positions, b.op("Mul", [masked, t_scalar])])
    _, perm = b.node("TopK", [key, t_len], 2, axis=1, largest=0, sorted=1)
    count = b.reduce("ReduceSum", m, [1], keepdims=False)
    cum = b.op("CumSum", [m, b.const(np.asarray(1, np.int64), "axis")])
    return StepOrder(perm, count, b.op("Cast", [count], to=INT32), cum, m, m_bool)


def gather_steps(b: GraphBuilder, x_nt: str, index_nt: str) -> str:
    """``out[n, j, ...] = x[n, index[n, j], ...]`` (GatherND with one batch dim)."""
    return b.op("GatherND", [x_nt, b.unsqueeze(index_nt, [2])], batch_dims=1)


def compact(b: GraphBuilder, x_ntf: str, order: StepOrder) -> str:
    """The valid steps of each row moved to the front, in time order."""
    return gather_steps(b, x_ntf, order.perm)


def expand(b: GraphBuilder, y_nth: str, order: StepOrder, reverse: bool, zero_masked: bool) -> str:
    """Compact outputs ``[N, T, H]`` back at their positions with Keras's fill rule."""
    if reverse:
        index = b.op("Sub", [order.cum, order.mask_i64])
        valid = b.op("Less", [index, b.unsqueeze(order.count, [1])])
    else:
        index = b.op("Sub", [order.cum, b.const(np.asarray(1, np.int64), "one")])
        valid = b.op("Greater", [order.cum, b.const(np.asarray(0, np.int64), "zero")])
    if zero_masked:
        valid = order.mask_bool
    t_last = b.op("Sub", [b.op("Shape", [y_nth], start=1, end=2), b.ints([1], "one")])
    clipped = b.op("Min", [b.op("Max", [index, b.const(np.asarray(0, np.int64), "zero")]),
                           b.squeeze(t_last, [0])])
    picked = gather_steps(b, y_nth, clipped)
    return b.op("Where", [b.unsqueeze(valid, [2]), picked, b.const(np.zeros((), np.float32), "zero_f")])


def keep_initial(b: GraphBuilder, y_h_dnh: str, initial_dnh: str, order: StepOrder) -> str:
    """Final state ``[D, N, H]``: the initial state for rows without a valid step (else ``Y_h``)."""
    empty = b.op("Equal", [order.count, b.const(np.asarray(0, np.int64), "zero")])
    return b.op("Where", [b.unsqueeze(empty, [0, 2]), initial_dnh, y_h_dnh])


def last_step_valid(b: GraphBuilder, order: StepOrder, reverse: bool) -> str:
    """``[N]`` bool: is the last processed step (T−1 forward, 0 reverse) valid?"""
    at = [0] if reverse else [-1]
    return b.squeeze(b.slice(order.mask_bool, at, [1] if reverse else [np.iinfo(np.int64).max], [1]), [1])
