"""One runner per runtime. Each maps ``{input name: array}`` to ``{tensor name: array}``.

Tensor names: the ONNX graph's output names for model outputs, probe names for probes.
Axes follow DESIGN.md: outputs as the model returns them (``[batch, time, ...]``); probe
``hidden_sequence`` ``[batch, time, 1, hidden]`` (index t = state after consuming input t, for
either direction), ``hidden_final``/``cell_final`` ``[batch, 1, hidden]``.
"""

from __future__ import annotations

from typing import Any, Protocol

import numpy as np


class Runner(Protocol):
    """What verify needs from a runtime."""

    def run(self, feeds: dict[str, np.ndarray[Any, Any]]) -> dict[str, np.ndarray[Any, Any]]: ...
