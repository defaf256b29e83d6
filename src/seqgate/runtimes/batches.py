"""Models with a fixed batch size: every call carries exactly that many windows.

A Keras model built with ``Input(batch_size=B)`` (required by ``stateful=True`` layers) keeps
``B`` in its ONNX file too, and both runtimes refuse any other batch. :func:`run_in_groups`
lets a runner take any number of windows anyway: the windows are split into groups of ``B``
along axis 0, the last group padded by repeating its last window (real, finite values), each
group run on its own, the padding rows dropped and the groups joined along axis 0 again.
Every value must hold the windows on axis 0 (Keras inputs and outputs, probes in DESIGN.md's
axes); rows of a recurrent model do not interact, so the padding changes nothing else.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

Array = np.ndarray[Any, Any]
Feeds = dict[str, Array]


def pad_rows(x: Array, size: int) -> Array:
    """``x`` with its last row repeated until it has ``size`` rows (unchanged when it has them)."""
    if x.shape[0] >= size:
        return x
    return np.concatenate([x, np.repeat(x[-1:], size - x.shape[0], axis=0)], axis=0)


def rows(feeds: Feeds) -> int:
    return int(next(iter(feeds.values())).shape[0])


def run_in_groups(run: Callable[[Feeds], Feeds], feeds: Feeds, size: int) -> Feeds:
    """``run`` over groups of exactly ``size`` windows (module docstring); one result per window."""
    n = rows(feeds)
    if n == size:
        return run(feeds)
    parts = []
    for a in range(0, n, size):
        got = run({k: pad_rows(v[a:a + size], size) for k, v in feeds.items()})
        keep = min(size, n - a)
        parts.append({k: v[:keep] for k, v in got.items()})
    return {k: np.concatenate([p[k] for p in parts], axis=0) for k in parts[0]}


def fixed_batch(model: Any, outputs: bool = True) -> int | None:
    """The fixed batch size of an ONNX model: every tensor input (and output, unless ``outputs``
    is False: a streaming file's state outputs are ``[1, batch, hidden]``) has the same integer
    dim 0; else None (the batch is free, or not on axis 0 everywhere)."""
    from seqgate.onnxfile.load import value_dims

    inits = {i.name for i in model.graph.initializer}
    values = [vi for vi in [*model.graph.input, *(model.graph.output if outputs else [])]
              if vi.name not in inits and vi.type.HasField("tensor_type")]
    firsts = {(value_dims(vi) or [None])[0] for vi in values}
    if len(firsts) != 1:
        return None
    b = firsts.pop()
    return b if isinstance(b, int) and b > 0 else None
