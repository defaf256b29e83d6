"""Probe values of recurrent cells (``nn.LSTMCell`` & co., user cells) from their recorded calls.

The exporter names a cell's probes by the calls they cover (``export.torch.cells``):

- ``source.cell_calls = [before, after]``: a loop over time, i.e. the calls
  ``calls[before : len(calls) − after]``; ``hidden_sequence`` stacks each call's hidden state
  on axis 1 (``[N, T, 1, H]``), ``hidden_final``/``cell_final`` are the last call's h / c;
- ``source.cell_call = i``: one call (a decoder step); its h / c as finals ``[N, 1, H]``.

A call's output is read at ``source.h_path`` / ``source.c_path`` (index paths into what the cell
returns; default LSTMCell ``(h, c)`` → [0] / [1], other cells ``h`` → []).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from seqgate.errors import Unsupported, UnsupportedModelError
from seqgate.onnxfile.probes import Probe


def is_cell_probe(p: Probe) -> bool:
    return "cell_calls" in p.source or "cell_call" in p.source


def _at(v: Any, path: list[int]) -> Any:
    for i in path:
        v = v[i]
    return v


def cell_probe_value(p: Probe, calls: list[tuple[Any, Any, Any]]) -> np.ndarray[Any, Any]:
    """The probe's value in DESIGN.md's axes from the cell's recorded (input, state, output) calls."""
    import torch

    src = p.source
    lstm = src.get("module_type") == "LSTMCell"
    h_path = list(src.get("h_path", [0] if lstm else []))
    c_path = list(src.get("c_path", [1] if lstm else []))
    if "cell_calls" in src:
        before, after = (int(v) for v in src["cell_calls"])
        outs = [c[2] for c in calls[before:len(calls) - after]]
    else:
        i = int(src["cell_call"])
        outs = [c[2] for c in calls[i:i + 1]]
    if not outs:
        name = str(src.get("module", p.layer))
        raise UnsupportedModelError(name, [Unsupported(
            name, "the cell was not called in forward as the probe map says", "export the model again")])
    if p.kind == "hidden_sequence":
        if src.get("calls_reversed"):  # a loop from the last step to the first: time order
            outs = outs[::-1]
        return torch.stack([_at(o, h_path) for o in outs], 1).unsqueeze(2).numpy()
    path = c_path if p.kind == "cell_final" else h_path
    return _at(outs[-1], path).unsqueeze(1).numpy()
