"""A forward that takes a dict, a dataclass or a tuple of tensors: exit 3 naming what was seen,
with a wrapper whose forward takes tensors — and that wrapper, exported, matches PyTorch."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pytest
import torch
from torch import nn

from seqgate.errors import UnsupportedModelError
from torch_models import export, rand, randomize, run_onnx, torch_outputs, worst


class DictForward(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 5, batch_first=True)

    def forward(self, x):  # unannotated, as in many projects
        return self.lstm(x["encoder_cont"] * x["encoder_scale"])[0]


@dataclass
class Window:
    values: torch.Tensor
    mask: torch.Tensor


class DataclassForward(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.gru = nn.GRU(3, 4, batch_first=True)

    def forward(self, batch: Window) -> torch.Tensor:
        return self.gru(batch.values * batch.mask)[0]


class TupleForward(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.gru = nn.GRU(3, 4, batch_first=True)

    def forward(self, inputs: tuple[torch.Tensor, torch.Tensor]) -> torch.Tensor:
        return self.gru(inputs[0] + inputs[1])[0]


def _refusal(m: nn.Module) -> str:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(m))
    assert e.value.exit_code == 3
    return str(e.value)


def test_dict_forward_names_the_keys_and_shows_a_wrapper() -> None:
    msg = _refusal(DictForward())
    assert "parameter 'x'" in msg and "x['encoder_cont'], x['encoder_scale']" in msg, msg
    assert "def forward(self, encoder_cont, encoder_scale):" in msg, msg
    assert "return self.model({'encoder_cont': encoder_cont, 'encoder_scale': encoder_scale})" in msg


def test_dataclass_forward_names_the_annotation_and_fields() -> None:
    msg = _refusal(DataclassForward())
    assert "parameter 'batch'" in msg and "annotated `Window`" in msg, msg
    assert "return self.model(Window(values=values, mask=mask))" in msg, msg


def test_unannotated_dataclass_forward_names_the_fields_read() -> None:
    class Unannotated(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.gru = nn.GRU(3, 4, batch_first=True)

        def forward(self, batch):  # unannotated
            return self.gru(batch.values * batch.mask)[0]

    msg = _refusal(Unannotated())
    assert "read as batch.values, batch.mask" in msg, msg
    assert "def forward(self, values, mask):" in msg, msg


def test_tuple_forward_names_the_annotation() -> None:
    msg = _refusal(TupleForward())
    assert "annotated `tuple[torch.Tensor, torch.Tensor]`" in msg, msg
    assert "return self.model((a, b))" in msg, msg


def test_the_wrapper_shown_exports_and_matches(rng: np.random.Generator) -> None:
    # the wrapper of the message, written out: its ONNX inputs are the dict's keys
    class Wrapped(nn.Module):
        def __init__(self, model: nn.Module) -> None:
            super().__init__()
            self.model = model

        def forward(self, encoder_cont: torch.Tensor, encoder_scale: torch.Tensor) -> torch.Tensor:
            return self.model({"encoder_cont": encoder_cont, "encoder_scale": encoder_scale})

    m = Wrapped(randomize(DictForward())).eval()
    model = export(m, ["encoder_cont:batch,time,3", "encoder_scale:batch,time,3"])
    assert [i.name for i in model.graph.input] == ["encoder_cont", "encoder_scale"]
    for n, t in ((1, 2), (4, 9)):
        feeds = {"encoder_cont": rand(rng, n, t, 3), "encoder_scale": rand(rng, n, t, 3)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))
