"""NumPy float64 oracle of a Keras recurrent layer called with a mask, written from the Keras
documentation (guide "Understanding masking & padding"; ``keras.layers.RNN`` docstring: call
argument ``mask`` — "a given timestep should be masked (skipped)" —, ``zero_output_for_mask``,
``go_backwards``, ``return_sequences``/``return_state``; ``keras.layers.Bidirectional``:
"the output of the masked timestep will be zero regardless of the layer's original
``zero_output_for_mask`` value" when returning sequences).

Written step by step, one cell step at a time, with no sorting or gathering (the exported
graph compacts the valid steps; this oracle does not), so the two are independent:

- steps are visited in time order, or from the last to the first with ``go_backwards``;
- at a masked step the state is carried unchanged and the output is the previous output
  (zeros before the first valid step) — or zeros with ``zero_output_for_mask``;
- the returned sequence is in processing order (reversed under ``go_backwards``);
  ``last_output`` is the output of the last processed step; states are the carried states.

The cell step is one step of the ONNX-spec oracles of ``reference_equations`` (their T=1 run
with the previous state as the initial state), Keras weights converted by
``reference_equations.keras_to_onnx``.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from reference_equations import keras_to_onnx, onnx_gru, onnx_lstm, onnx_rnn

Array = np.ndarray[Any, Any]


def _step(kind: str, w: tuple[Array, Array, Array | None], x: Array, h: Array, c: Array | None,
          lbr: int) -> tuple[Array, Array | None]:
    X = x[None]
    if kind == "lstm":
        _, yh, yc = onnx_lstm(X, *w, initial_h=h[None], initial_c=c[None])
        return yh[0], yc[0]
    if kind == "gru":
        _, yh = onnx_gru(X, *w, initial_h=h[None], linear_before_reset=lbr)
        return yh[0], None
    _, yh = onnx_rnn(X, *w, initial_h=h[None])
    return yh[0], None


def keras_masked_rnn(kind: str, layer_weights: list[Array], x: Array, mask: Array,
                     h0: Array | None = None, c0: Array | None = None, go_backwards: bool = False,
                     zero_output_for_mask: bool = False, reset_after: bool = False
                     ) -> tuple[Array, Array, list[Array]]:
    """``(sequence [N, T, H] in processing order, last_output [N, H], states)`` of one layer.

    ``layer_weights`` = Keras ``[kernel, recurrent_kernel, bias]`` (bias optional);
    tanh/sigmoid activations (the Keras defaults).
    """
    bias = layer_weights[2] if len(layer_weights) > 2 else None
    w = keras_to_onnx(kind, layer_weights[0], layer_weights[1], bias, reset_after)
    N, T = mask.shape
    H = np.asarray(layer_weights[1]).shape[0]
    h = np.zeros((N, H)) if h0 is None else np.asarray(h0, np.float64)
    c = (np.zeros((N, H)) if c0 is None else np.asarray(c0, np.float64)) if kind == "lstm" else None
    prev = np.zeros((N, H))
    outs = []
    for t in (range(T - 1, -1, -1) if go_backwards else range(T)):
        m = mask[:, t].astype(bool)[:, None]
        h_new, c_new = _step(kind, w, np.asarray(x[:, t], np.float64), h, c, int(reset_after))
        out = np.where(m, h_new, 0.0 if zero_output_for_mask else prev)
        h = np.where(m, h_new, h)
        if c is not None:
            c = np.where(m, c_new, c)
        prev = out
        outs.append(out)
    states = [h] if c is None else [h, c]
    return np.stack(outs, axis=1), outs[-1], states


def mask_patterns(rng: np.random.Generator, n: int, t: int) -> dict[str, Array]:
    """Right padding, left padding, holes, and rows with every or no step valid (bool ``[n, t]``)."""
    lengths = rng.integers(1, t + 1, size=n)
    lengths[0] = t
    right = np.arange(t)[None] < lengths[:, None]
    left = right[:, ::-1].copy()
    holes = rng.random((n, t)) < 0.6
    holes[0] = True
    if n > 1:
        holes[1] = False  # a window with no valid step
    if n > 2:
        holes[2, :] = False
        holes[2, t // 2] = True  # exactly one valid step, in the middle
    return {"right": right, "left": left, "holes": holes}


Step = Callable[[Array, list[Array]], tuple[Array, list[Array]]]


def keras_masked_loop(step: Step, x: Array, mask: Array, states: list[Array], go_backwards: bool = False,
                      zero_output_for_mask: bool = False) -> tuple[Array, Array, list[Array]]:
    """The same masked loop as :func:`keras_masked_rnn` for any cell ``step(x_t, states) →
    (output_t, new_states)`` (Keras ``RNN`` docstring: a cell is a ``call(inputs, states)``
    returning ``(output, new_states)``). Returns ``(sequence in processing order, last_output,
    states)``; the output at a masked step is the previous one (zeros before the first valid
    step), or zeros with ``zero_output_for_mask``; every state is carried over a masked step."""
    T = mask.shape[1]
    states = [np.asarray(s, np.float64) for s in states]
    prev: Array | None = None
    outs = []
    for t in (range(T - 1, -1, -1) if go_backwards else range(T)):
        m = mask[:, t].astype(bool)[:, None]
        y, new = step(np.asarray(x[:, t], np.float64), states)
        prev = np.zeros_like(y) if prev is None else prev
        out = np.where(m, y, 0.0 if zero_output_for_mask else prev)
        states = [np.where(m, n, s) for n, s in zip(new, states, strict=True)]
        prev = out
        outs.append(out)
    return np.stack(outs, axis=1), outs[-1], states


def builtin_cell_step(kind: str, layer_weights: list[Array], reset_after: bool = False) -> Step:
    """One step of a built-in Keras cell (output = new h), from the ONNX-spec oracles."""
    bias = layer_weights[2] if len(layer_weights) > 2 else None
    w = keras_to_onnx(kind, layer_weights[0], layer_weights[1], bias, reset_after)

    def step(x: Array, states: list[Array]) -> tuple[Array, list[Array]]:
        h, c = _step(kind, w, x, states[0], states[1] if kind == "lstm" else None, int(reset_after))
        return h, [h] if c is None else [h, c]

    return step


def stacked_step(steps: list[tuple[Step, int]]) -> Step:
    """Keras ``StackedRNNCells.call``: cell k reads cell k−1's output of the same step; the states
    are the cells' states in order; the output is the last cell's. ``steps``: (step, state count)."""

    def step(x: Array, states: list[Array]) -> tuple[Array, list[Array]]:
        new: list[Array] = []
        at = 0
        for fn, count in steps:
            x, s = fn(x, states[at:at + count])
            new.extend(s)
            at += count
        return x, new

    return step
