"""torch.where / masked_fill / clamp family and list or tensor indices, exported and compared with torch.

Each case is a small module of its own; the reference is PyTorch eager on inputs built here,
at two batch/time sizes through one exported graph. NaN cases are also read through
``onnx.reference`` (the ONNX operator specs as executable code).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
import torch
from torch import nn as tnn

from seqgate.errors import UnsupportedModelError
from torch_models import check_linear_then, export, linear_then, rand, randomize, run_onnx, torch_outputs, worst

torch.set_num_threads(1)


def _check(fn: Callable[..., Any]) -> Any:
    return check_linear_then(fn, np.random.default_rng(3))


_IDX = torch.tensor([4, 0, -1])

CASES: dict[str, Callable[..., Any]] = {
    # torch.where with tensors, broadcasting and Python numbers
    "where_tensors": lambda y: torch.where(y > 0, y, y * 3),
    "where_scalar_else": lambda y: torch.where(y > 0, y, 0.0),
    "where_scalar_then": lambda y: torch.where(y < 0.1, -2, y),
    "where_two_scalars": lambda y: torch.where(y[:, :, :1] > 0, 1.5, -0.5) + y,
    "where_broadcast": lambda y: torch.where(y[:, :1, :] > 0, y, y[:, :, :1]),
    "where_int_scalar_float": lambda y: torch.where(y > 0, (y * 4).long(), 0.5),
    "tensor_where": lambda y: y.where(y > 0.2, y[:, :, 2:3]),
    "masked_fill": lambda y: y.masked_fill(y < 0, -7.0),
    # clamp family: number bounds, tensor bounds, broadcast tensor bounds, lo > hi
    "clamp_numbers": lambda y: torch.clamp(y, -0.3, 0.4), "clamp_min_number": lambda y: y.clamp_min(0.1),
    "clamp_max_number": lambda y: y.clamp_max(-0.2), "torch_clamp_min": lambda y: torch.clamp_min(y, 0.0),
    "clamp_min_tensor": lambda y: y.clamp_min(y[:, :, :1]),
    "clamp_max_tensor": lambda y: y.clamp_max(y.mean(dim=1, keepdim=True)),
    "clamp_tensors": lambda y: torch.clamp(y, min=y[..., :1], max=y[..., 1:2]),
    "clamp_lo_above_hi": lambda y: torch.clamp(y, 0.5, -0.5),
    "clamp_int_float_bound": lambda y: torch.clamp((y * 4).long(), min=0.5),
    "clamp_min_inplace": lambda y: (y * 2).clamp_min_(0.0),
    # indices torch reads from a list, and one tensor / list-of-ints index (Gather)
    "list_of_slices": lambda y: y[[slice(None), slice(-2, None)]],
    "list_of_slices_neg": lambda y: y[[slice(None), slice(-3, -1)]],
    "list_of_slices_3": lambda y: y[[slice(None), slice(1, None), slice(None)]],
    "list_of_ints": lambda y: y[:, :, [5, 0, -2]], "list_leading": lambda y: y[[0, 0]],
    "tensor_index": lambda y: y[..., _IDX], "tensor_index_mid": lambda y: y[:, :, _IDX[:2]].sum(-1),
    "int_then_tensor": lambda y: y[:, 0, _IDX], "int_slice_tensor": lambda y: y[0, :, [1, 2]],
    "tensor_index_2d": lambda y: y[..., torch.tensor([[1], [3]])],
}


@pytest.mark.parametrize("name", list(CASES))
def test_case_matches_torch(name: str) -> None:
    _check(CASES[name])


@pytest.mark.parametrize("name", ["where_broadcast", "where_int_scalar_float", "clamp_tensors",
                                  "clamp_lo_above_hi", "list_of_slices_neg", "int_then_tensor",
                                  "tensor_index_2d"])
def test_case_through_the_onnx_reference(name: str) -> None:
    # onnx.reference runs the operator specs (Where-16, Clip-13, Max/Min-13, Slice-13, Gather-13,
    # Cast-13) as NumPy code: a second reading of the exported graph beside ONNX Runtime.
    from onnx.reference import ReferenceEvaluator

    m = randomize(linear_then(CASES[name]), seed=1)
    model = export(m, inputs=["x:batch,time,6"])
    feeds = {"x": rand(np.random.default_rng(4), 2, 5, 6)}
    worst(torch_outputs(m, feeds), ReferenceEvaluator(model).run(None, feeds))


def test_torch_places_a_tensor_index_after_the_ints() -> None:
    # Hand-worked: torch applies x[0] first, so x[0, :, [1, 2]] of a [2, 3, 4] tensor is [3, 2]
    # (numpy's rule would give [2, 3]); the exported graph must agree with torch, not numpy.
    x = torch.arange(24.0).reshape(2, 3, 4)
    assert tuple(x[0, :, [1, 2]].shape) == (3, 2)
    m = linear_then(lambda y: y[0, :, [1, 2]])
    model = export(m, inputs=["x:2,time,6"])
    got = run_onnx(model, {"x": np.ones((2, 3, 6), np.float32)})[0]
    assert got.shape == (3, 2)


class _NaN(tnn.Module):
    def forward(self, x: torch.Tensor, lo: torch.Tensor) -> Any:
        return torch.clamp(x, -1.0, 1.0), x.clamp_min(lo), torch.clamp(x, max=lo), torch.where(x > 0, x, lo)


def test_nan_propagates_like_torch_and_the_onnx_reference() -> None:
    from onnx.reference import ReferenceEvaluator

    x = np.array([[np.nan, 2.0, -3.0, 0.5]], np.float32)
    lo = np.array([[0.0, np.nan, 0.0, 0.25]], np.float32)
    model = export(_NaN(), inputs=["x:batch,4", "lo:batch,4"])
    feeds = {"x": x, "lo": lo}
    ref = torch_outputs(_NaN(), feeds)
    # torch: NaN in the input stays NaN through clamp/clamp_min (its documented min(max(x, lo), hi))
    assert np.isnan(ref[0][0, 0]) and np.isnan(ref[1][0, 0])
    for got in (run_onnx(model, feeds), ReferenceEvaluator(model).run(None, feeds)):
        for r, g in zip(ref, got, strict=True):
            np.testing.assert_array_equal(g, r)  # NaN positions must match too


def test_clamp_refusals_name_the_problem() -> None:
    with pytest.raises(UnsupportedModelError, match="NaN bound"):
        export(randomize(linear_then(lambda y: y.clamp(min=float("nan")))), inputs=["x:batch,time,6"])
    with pytest.raises(UnsupportedModelError, match="one argument"):
        export(randomize(linear_then(lambda y: torch.where(y > 0)[0])), inputs=["x:batch,time,6"])


def test_index_refusals_name_the_problem() -> None:
    with pytest.raises(UnsupportedModelError, match="bool mask"):
        export(randomize(linear_then(lambda y: y[y > 0])), inputs=["x:batch,time,6"])
    with pytest.raises(UnsupportedModelError, match="more than one tensor"):
        export(randomize(linear_then(lambda y: y[:, [0, 1], [1, 2]])), inputs=["x:batch,time,6"])
