"""Forwards that branch on sizes, use len() on a static dim, or build parameter-free modules per call.

Every export is checked against PyTorch's own forward on the same inputs (an independent
computation: torch's eager kernels) at two sizes of each dynamic dim; refusals are pinned by
message.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
import torch
from torch import nn

import torch_reference
from seqgate.errors import UnsupportedModelError
from torch_models import export, rand, randomize, run_onnx, torch_outputs, worst


class SizeBranches(nn.Module):
    """The forms met in real cells and layers: ``x.dim() == 2``, ``x.shape[2] > 1``,
    ``layer_input.size(-1) == self.hidden_size``."""

    def __init__(self) -> None:
        super().__init__()
        self.hidden_size = 6
        self.lstm = nn.LSTM(1, 6, batch_first=True)
        self.proj = nn.Linear(6, 6)
        self.fc = nn.Linear(6, 2)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.dim() == 2:
            x = x.unsqueeze(-1)
        if x.shape[2] > 1:  # never true here: the LSTM reads one feature
            x = x[..., :1]
        out, _ = self.lstm(x)
        if out.size(-1) == self.hidden_size:
            out = out + torch.tanh(self.proj(out))
        else:
            out = out * 0.0
        return self.fc(out[:, -1])


class LenOfFeatures(nn.Module):
    """``n = len(feats)`` on the static feature dim, then a Python loop over it."""

    def __init__(self) -> None:
        super().__init__()
        self.gru = nn.GRU(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        feats = x.permute(2, 0, 1)  # [features, batch, time]
        n = len(feats)
        total = feats[0]
        for i in range(1, n):
            total = total + feats[i] * float(i + 1)
        out, _ = self.gru(x + total.unsqueeze(-1))
        return out


class BatchBranch(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.size(0) > 1:
            x = x * 2.0
        return self.lstm(x)[0]


class DataBranch(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.mean() > 0:
            x = x * 2.0
        return self.lstm(x)[0]


class PerCallSoftmax(nn.Module):
    """Attention over the LSTM outputs with ``nn.Softmax`` built inside forward, and a
    parameter-free helper module built per call."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 5, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out, _ = self.lstm(x)
        scores = out @ out.transpose(1, 2) / 5.0 ** 0.5
        weights = nn.Softmax(dim=-1)(scores)
        return _Pool()(weights @ out)


class _Pool(nn.Module):
    def forward(self, z: torch.Tensor) -> torch.Tensor:
        return nn.Tanh()(z.mean(dim=1))


class PerCallLinear(nn.Module):
    """A module with weights built per call: fresh random weights every call, never exported."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 5, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return nn.Linear(5, 2)(self.lstm(x)[0])


def _check(m: Any, inputs: list[str] | None, shapes: list[tuple[int, ...]], rng: np.random.Generator) -> None:
    model = export(m, inputs)
    for shape in shapes:
        feeds = {"x": rand(rng, *shape)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))


def test_size_branches_three_d_input(rng: np.random.Generator) -> None:
    # the input dims come from the LSTM: [batch, time, 1]; x.dim() == 2 is false
    _check(randomize(SizeBranches()), None, [(1, 2, 1), (4, 9, 1)], rng)


def test_size_branches_two_d_input_takes_the_other_branch(rng: np.random.Generator) -> None:
    _check(randomize(SizeBranches()), ["x:batch,time"], [(1, 2), (5, 11)], rng)


def test_len_on_a_static_dim(rng: np.random.Generator) -> None:
    _check(randomize(LenOfFeatures()), None, [(1, 3, 3), (4, 10, 3)], rng)


def test_branch_on_batch_is_refused_naming_the_dim() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(BatchBranch()))
    msg = str(e.value)
    assert e.value.exit_code == 3
    assert "if x.size(0) > 1:" in msg and "dynamic dim (`batch`)" in msg, msg
    assert "--input x:24,time,3" in msg, msg


def test_branch_on_batch_exports_when_the_batch_is_fixed(rng: np.random.Generator) -> None:
    _check(randomize(BatchBranch()), ["x:4,time,3"], [(4, 2, 3), (4, 8, 3)], rng)


def test_branch_on_a_fixed_batch_of_one_takes_the_other_branch(rng: np.random.Generator) -> None:
    _check(randomize(BatchBranch()), ["x:1,time,3"], [(1, 5, 3)], rng)


def test_len_of_the_batch_dim_is_refused() -> None:
    class LenBatch(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.lstm = nn.LSTM(3, 4, batch_first=True)

        def forward(self, x: torch.Tensor) -> torch.Tensor:
            scale = 1.0 / len(x)
            return self.lstm(x)[0] * scale

    msg = r"size used as a Python number is a dynamic dim \(`batch`\)"
    with pytest.raises(UnsupportedModelError, match=msg):
        export(randomize(LenBatch()))


def test_branch_on_tensor_data_is_refused() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(DataBranch()))
    msg = str(e.value)
    assert "if x.mean() > 0:" in msg and "decides on tensor data" in msg, msg
    assert "torch.where" in msg


def test_parameter_free_modules_built_in_forward_are_inlined(rng: np.random.Generator) -> None:
    _check(randomize(PerCallSoftmax()), None, [(1, 2, 3), (3, 7, 3)], rng)


def test_module_with_weights_built_in_forward_stays_refused() -> None:
    with pytest.raises(UnsupportedModelError, match=r"not installed as a submodule"):
        export(randomize(PerCallLinear()))


class InstanceNormByRank(nn.Module):
    """Normalisation over every axis between batch and features, the axes listed with
    ``range(1, x.ndim - 1)`` (a loop over the rank, fixed for the export), an affine whose
    weight is reshaped with ``w.shape + (1,)``, then a GRU."""

    def __init__(self) -> None:
        super().__init__()
        self.weight = nn.Parameter(torch.ones(3))
        self.bias = nn.Parameter(torch.zeros(3))
        self.gru = nn.GRU(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        dims = tuple(range(1, x.ndim - 1))
        mean = torch.mean(x, dim=dims, keepdim=True)
        std = torch.sqrt(torch.var(x, dim=dims, keepdim=True, unbiased=False) + 1e-5)
        z = (x - mean) / std
        scale = self.weight.view(self.weight.shape + (1,))  # noqa: RUF005 - the form under test
        z = (z.transpose(1, 2) * scale).transpose(1, 2) + self.bias
        return self.gru(z)[0] + x.std(dim=1, keepdim=True)[..., :1]


def test_loop_over_the_rank_is_decided_at_trace_time(rng: np.random.Generator) -> None:
    m = randomize(InstanceNormByRank())
    model = export(m)
    for shape in ((1, 2, 3), (4, 9, 3)):
        x = rand(rng, *shape)
        got = run_onnx(model, {"x": x})
        worst(torch_outputs(m, {"x": x}), got)
        # NumPy: biased variance over time for the normalisation (np.var, ddof=0), the
        # correction-1 standard deviation (np.std, ddof=1) added at the end
        w, bias = m.weight.detach().numpy(), m.bias.detach().numpy()
        xd = x.astype(np.float64)
        z = (xd - xd.mean(1, keepdims=True)) / np.sqrt(xd.var(1, keepdims=True) + 1e-5) * w + bias
        ref = torch_reference.run_module("gru", {k: v.numpy() for k, v in m.gru.state_dict().items()},
                                         z, 1, False, True)["output"]
        worst([ref + xd.std(1, ddof=1, keepdims=True)[..., :1]], got)


class RankFromShape(nn.Module):
    """``len(x.shape)`` and a loop over ``x.shape`` (the rank, fixed for the export) beside a size
    branch, so the value-carrying trace reads them."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.dim() == 2:
            x = x.unsqueeze(-1)
        idx = [slice(None)] * len(x.shape)
        idx[-1] = slice(0, 3)
        n_axes = sum(1 for _ in x.shape)
        return self.lstm(x[tuple(idx)])[0] * float(n_axes)


def test_len_of_a_shape_in_the_value_carrying_trace(rng: np.random.Generator) -> None:
    _check(randomize(RankFromShape()), None, [(1, 2, 3), (4, 9, 3)], rng)


class EpsFromDtype(nn.Module):
    """``torch.finfo(x.dtype).eps`` (a scale floor, as probabilistic forecasters write it) beside a
    size branch, so the value-carrying trace runs; the dtype is the declared input's."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.dim() == 2:
            x = x.unsqueeze(-1)
        y = self.lstm(x.to(x.dtype))[0]
        return y.abs() + torch.finfo(y.dtype).eps


def test_dtype_read_in_the_value_carrying_trace_is_the_samples(rng: np.random.Generator) -> None:
    # reference: float32's machine epsilon is 2**-23 (IEEE-754 binary32, 23 fraction bits)
    assert torch.finfo(torch.float32).eps == 2.0 ** -23
    _check(randomize(EpsFromDtype()), None, [(1, 2, 3), (4, 9, 3)], rng)
