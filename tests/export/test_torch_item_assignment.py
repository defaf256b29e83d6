"""Item assignment ``x[idx] = v`` and ``torch.roll`` inside forward(), exported and compared.

References: PyTorch eager on inputs built here (every case, at two batch/time sizes through one
exported graph), NumPy's own item assignment and ``np.roll`` for hand-set cases, and
``onnx.reference`` (the ONNX specs of Where, Pad, Gather, Range, Concat, Slice as executable
code) for one model of each kind.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
import torch
from torch import nn as tnn

from seqgate.errors import UnsupportedModelError
from torch_models import export, rand, randomize, run_onnx, torch_outputs, worst

torch.set_num_threads(1)


class Assign(tnn.Module):
    """Linear front end, a copy, then ``fn(y)`` assigns into it; returns ``y`` and a value read after."""

    def __init__(self, fn: Callable[[torch.Tensor], Any]) -> None:
        super().__init__()
        self.fn = fn
        self.lin = tnn.Linear(4, 4)

    def forward(self, x: torch.Tensor) -> Any:
        y = self.lin(x).clone()
        self.fn(y)
        return y, y.sum(dim=1) * 2  # a reader after the assignment sees the new value


def _set(idx: Any, value: Callable[[torch.Tensor], Any] | float) -> Callable[[torch.Tensor], None]:
    def fn(y: torch.Tensor) -> None:
        y[idx] = value(y) if callable(value) else value

    return fn


_POS = [2, 0]
_ALL = slice(None)
CASES: dict[str, Callable[[torch.Tensor], None]] = {
    "int_time": _set((_ALL, 0), 5.0), "neg_int_time": _set((_ALL, -1), lambda y: y[:, 0].clone()),
    "int_feature": _set((Ellipsis, 3), lambda y: y[..., 0] * 2),
    "slice_time": _set((_ALL, slice(1, 3)), -1.0), "slice_open": _set((_ALL, slice(2, None)), 0.0),
    "neg_slice": _set((_ALL, slice(-3, None)), lambda y: y[:, :3] * 3),
    "neg_slice_both": _set((_ALL, slice(-3, -1), slice(1, 3)), 7.0),
    "slice_past_end": _set((_ALL, slice(2, 100)), 1.0), "slice_before_start": _set((_ALL, slice(-100, 2)), 1.0),
    "empty_slice": _set((_ALL, slice(3, 1)), 9.0),
    "broadcast_row": _set((_ALL, slice(1, None)), lambda y: y[0, 0] * 1.5),
    "leading_ones": _set((0, 1), lambda y: y[:1, :1, :].reshape(1, 1, 4) - 1),
    "list_feature": _set((Ellipsis, [1, 3]), lambda y: y[..., :2].clone()),
    "tensor_feature": _set((Ellipsis, torch.tensor(_POS)),
                           lambda y: torch.roll(y[..., torch.tensor(_POS)], shifts=1, dims=1)),
    "int_and_list": _set((_ALL, 0, [3, 1]), lambda y: y[:, 1, :2].clone()),
    "negative_list": _set((Ellipsis, [-1, 0]), -2.0),
    "ellipsis_all": _set(Ellipsis, 0.5), "all_tensor": _set(Ellipsis, lambda y: -y),
    "batch_int": _set(0, lambda y: y[-1] + 0.25),
}


def _check(m: tnn.Module, dims: str = "x:batch,time,4") -> Any:
    rng = np.random.default_rng(5)
    model = export(m, inputs=[dims])
    for n, t in ((1, 4), (3, 9)):
        feeds = {"x": rand(rng, n, t, 4)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))
    return model


@pytest.mark.parametrize("name", list(CASES))
def test_assignment_matches_torch(name: str) -> None:
    _check(randomize(Assign(CASES[name]), seed=2))


class _Twice(tnn.Module):
    def forward(self, x: torch.Tensor) -> Any:
        y = x * 1.0
        y[:, 0] = 1.0
        between = y.sum()  # reads the first assignment only
        y[:, 1:] = y[:, :1] + 2.0
        return y, between


def test_a_reader_between_two_assignments_sees_only_the_first_like_numpy() -> None:
    # Independent reference: NumPy's own item assignment on a copy, step by step.
    x = np.arange(12, dtype=np.float32).reshape(3, 4) / 4
    ref = x.copy()
    ref[:, 0] = 1.0
    between = ref.sum()
    ref[:, 1:] = ref[:, :1] + 2.0
    model = export(_Twice(), inputs=["x:batch,time"])
    got = run_onnx(model, {"x": x})
    np.testing.assert_allclose(got[0], ref, rtol=0, atol=0)
    np.testing.assert_allclose(got[1], between, rtol=1e-6)


class _Roll(tnn.Module):
    def forward(self, x: torch.Tensor) -> Any:
        return (torch.roll(x, 1, 1), x.roll(-2, 1), torch.roll(x, 11, 2), torch.roll(x, (1, -1), (1, 2)),
                torch.roll(x, 5), torch.roll(x, 0, 1))


def test_roll_matches_numpy_and_torch_and_the_onnx_reference() -> None:
    from onnx.reference import ReferenceEvaluator

    x = np.arange(2 * 5 * 3, dtype=np.float32).reshape(2, 5, 3)
    model = export(_Roll(), inputs=["x:batch,time,3"])
    # np.roll is an independent statement of the same rule (last k entries move to the front)
    ref = [np.roll(x, 1, 1), np.roll(x, -2, 1), np.roll(x, 11, 2), np.roll(x, (1, -1), (1, 2)),
           np.roll(x, 5), x]
    for got in (run_onnx(model, {"x": x}), ReferenceEvaluator(model).run(None, {"x": x})):
        for r, g in zip(ref, got, strict=True):
            np.testing.assert_array_equal(g, r)
    x7 = np.arange(2 * 7 * 3, dtype=np.float32).reshape(2, 7, 3)  # the dynamic time dim at another size
    worst(torch_outputs(_Roll(), {"x": x7}), run_onnx(model, {"x": x7}))


def test_assignment_through_the_onnx_reference() -> None:
    from onnx.reference import ReferenceEvaluator

    m = randomize(Assign(_set((_ALL, slice(-3, -1), [3, 0]), lambda y: y[:, :2, :2] * 5)), seed=3)
    model = export(m, inputs=["x:batch,time,4"])
    feeds = {"x": rand(np.random.default_rng(1), 2, 6, 4)}
    worst(torch_outputs(m, feeds), ReferenceEvaluator(model).run(None, feeds))


class _CellLoop(tnn.Module):
    """The loop capture's path: a cell stepped over time after an assignment into the input copy."""

    def __init__(self) -> None:
        super().__init__()
        self.cell = tnn.LSTMCell(3, 5)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        v = x.clone()
        v[..., [0]] = torch.roll(v[..., [0]], shifts=1, dims=1)
        v[:, 0, 0] = 0.0
        h = torch.zeros(x.size(0), 5)
        c = torch.zeros(x.size(0), 5)
        outs = []
        for t in range(v.size(1)):
            h, c = self.cell(v[:, t], (h, c))
            outs.append(h)
        return torch.stack(outs, 1)


def test_assignment_in_a_forward_with_a_cell_loop() -> None:
    m = randomize(_CellLoop(), seed=4)
    rng = np.random.default_rng(2)
    model = export(m, inputs=["x:batch,time,3"])
    for n, t in ((2, 5), (3, 8)):
        feeds = {"x": rand(rng, n, t, 3)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))


class _Bad(tnn.Module):
    def __init__(self, fn: Callable[..., Any]) -> None:
        super().__init__()
        self.fn = fn

    def forward(self, x: torch.Tensor) -> Any:
        return self.fn(self, x)


def _into_input(m: tnn.Module, x: torch.Tensor) -> torch.Tensor:
    x[:, 0] = 0.0
    return x * 2


def _into_view(m: tnn.Module, x: torch.Tensor) -> torch.Tensor:
    y = x * 1.0
    y[:, :2][:, 0] = 0.0
    return y


def _stale_view(m: tnn.Module, x: torch.Tensor) -> Any:
    y = x * 1.0
    first = y[:, 0]
    y[:, 0] = 3.0
    return y, first * 1.0


def _overlapping(m: tnn.Module, x: torch.Tensor) -> torch.Tensor:
    y = x * 1.0
    y[:, 1:3] = y[:, :2]  # torch reads y[:, 1] after writing it (measured: y[:, 2] gets y[:, 0])
    return y


def _data_index(m: tnn.Module, x: torch.Tensor) -> torch.Tensor:
    y = x * 1.0
    y[:, :, (x[0, 0, :2] > 0).long()] = 0.0
    return y


def _step_two(m: tnn.Module, x: torch.Tensor) -> torch.Tensor:
    y = x * 1.0
    y[:, ::2] = 0.0
    return y


def _twice_named(m: tnn.Module, x: torch.Tensor) -> torch.Tensor:
    y = x * 1.0
    y[..., [1, -3]] = 0.0
    return y


@pytest.mark.parametrize(("fn", "message"), [
    (_into_input, "forward\\(\\) input"), (_into_view, "into a view"), (_stale_view, "read after it"),
    (_overlapping, "view of the same tensor"), (_data_index, "computed from the data"),
    (_step_two, "step 2"), (_twice_named, "position twice"),
])
def test_assignments_that_would_not_be_exact_are_refused(fn: Callable[..., Any], message: str) -> None:
    with pytest.raises(UnsupportedModelError, match=message):
        export(_Bad(fn), inputs=["x:batch,time,4"])
