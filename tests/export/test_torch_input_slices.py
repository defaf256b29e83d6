"""Modules that slice their input or an LSTM's output while seqgate infers the input spec.

fx arguments hold ``slice`` objects, which are not hashable on Python 3.11 (FACTS.md, measured);
input inference used to look them up in a dict and crash with "unhashable type: 'slice'".
The reference is PyTorch itself (the source framework) on the same inputs.
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn as tnn

from torch_models import check, export, rand, randomize, run_onnx, torch_outputs, worst

torch.set_num_threads(1)


class NormalisedLastStep(tnn.Module):
    """Scale x with stored statistics, run an LSTM, read the last step into a Linear head."""

    def __init__(self) -> None:
        super().__init__()
        self.register_buffer("mean", torch.linspace(-0.5, 0.5, 4))
        self.register_buffer("std", torch.linspace(0.5, 2.0, 4))
        self.lstm = tnn.LSTM(4, 6, batch_first=True)
        self.fc = tnn.Linear(6, 2)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = (x - self.mean) / self.std
        out, _ = self.lstm(x)
        return self.fc(out[:, -1])


class RecentWindow(tnn.Module):
    """Read only the 12 most recent steps of the input."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = tnn.LSTM(3, 5, batch_first=True)
        self.fc = tnn.Linear(5, 1)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out, _ = self.lstm(x[:, -12:])
        return self.fc(out[:, -1, :])


@pytest.mark.parametrize("inputs", [None, ["x:batch,time,4"]])
def test_normalised_last_step_exports(inputs: list[str] | None, rng: np.random.Generator) -> None:
    m = randomize(NormalisedLastStep(), seed=3)
    check(m, {"x": rand(rng, 3, 9, 4)}, inputs=inputs)


@pytest.mark.parametrize("inputs", [None, ["x:batch,time,3"]])
def test_recent_window_slice_exports(inputs: list[str] | None, rng: np.random.Generator) -> None:
    m = randomize(RecentWindow(), seed=4)
    model = export(m, inputs)
    # Longer and shorter than the 12-step window: Python slicing clamps, and so must the export.
    for t in (20, 12, 5):
        feeds = {"x": rand(rng, 2, t, 3)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))
