"""Functions and tensor methods inside forward(): each exported and matched against torch.

Every case runs at two batch/time sizes through one exported graph, so sizes read with
``size()``/``shape`` must stay dynamic in ONNX.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn as tnn

from seqgate.errors import UnsupportedModelError
from torch_models import check_linear_then, export, linear_then, rand, randomize, run_onnx, torch_outputs, worst

torch.set_num_threads(1)


def _check3(fn: Callable[..., Any], rng: np.random.Generator) -> Any:
    return check_linear_then(fn, rng)


def _split_mul(y: torch.Tensor) -> torch.Tensor:
    a, b = y.chunk(2, dim=-1)
    return a * b


def _unpack_shape(y: torch.Tensor) -> torch.Tensor:
    n, t, f = y.shape
    return y.reshape(n * t, f)


CASES: dict[str, Callable[..., Any]] = {
    # indexing
    "last_step": lambda y: y[:, -1, :], "first_step": lambda y: y[:, 0], "range": lambda y: y[:, 1:3],
    "features": lambda y: y[:, :, :3], "ellipsis": lambda y: y[..., -2:], "stride": lambda y: y[:, ::2],
    "none": lambda y: y[:, None], "leading_int": lambda y: y[-1], "mixed": lambda y: y[:, -3:-1, 1:5:2],
    "neg_int_mid": lambda y: y[:, :, -2], "dyn_bound": lambda y: y[:, : y.size(1) - 1],
    # layout
    "permute": lambda y: y.permute(1, 0, 2), "permute_tuple": lambda y: y.permute((2, 0, 1)),
    "torch_permute": lambda y: torch.permute(y, (1, 2, 0)), "transpose": lambda y: y.transpose(1, 2),
    "torch_transpose": lambda y: torch.transpose(y, 0, -1),
    "contiguous": lambda y: y.transpose(0, 1).contiguous(),
    # reshaping, sizes kept dynamic
    "reshape_size": lambda y: y.reshape(y.size(0), -1), "view_static": lambda y: y.view(-1, 6),
    "view_shape": lambda y: y.view(y.shape[0], y.shape[1], 2, 3),
    "torch_reshape": lambda y: torch.reshape(y, (-1, 3)),
    "view_mul": lambda y: y.view(y.size(0), y.size(1) * 6), "unpack_shape": _unpack_shape,
    "flatten": lambda y: y.flatten(1), "torch_flatten": lambda y: torch.flatten(y),
    "unsqueeze": lambda y: y.unsqueeze(1), "unsqueeze_neg": lambda y: y.unsqueeze(-1),
    "squeeze_dim": lambda y: y[:, :1].squeeze(1), "squeeze_noop": lambda y: y.squeeze(2),
    "view_as": lambda y: y[:, :, :3].reshape(-1).view_as(y[:, :, 3:]),
    "expand": lambda y: y[:, :1].expand(-1, y.size(1), -1) + y,
    # joins
    "cat": lambda y: torch.cat([y, y * 2], dim=-1), "cat_tuple": lambda y: torch.cat((y, y), 1),
    "stack": lambda y: torch.stack([y, -y], dim=1), "stack_last": lambda y: torch.stack([y, y], -1),
    "chunk": _split_mul, "split": lambda y: y.split([2, 4], dim=-1)[1],
    # arithmetic
    "add_scalar": lambda y: y + 1, "rsub": lambda y: 1 - y, "rmul": lambda y: 2 * y, "div": lambda y: y / 3,
    "rdiv": lambda y: 3 / (y.abs() + 1), "center": lambda y: y - y.mean(), "square": lambda y: y * y,
    "pow": lambda y: y ** 2, "floordiv": lambda y: y // 0.5, "add_alpha": lambda y: torch.add(y, y, alpha=0.5),
    "method_add": lambda y: y.add(1).mul(y), "torch_div": lambda y: torch.div(y, 2), "neg": lambda y: -y,
    "size_scale": lambda y: y / y.size(1), "matmul": lambda y: y @ y.transpose(1, 2),
    # reductions
    "mean": lambda y: y.mean(1), "mean_axes": lambda y: y.mean((1, 2)), "mean_all": lambda y: y.mean(),
    "sum_keep": lambda y: y.sum(-1, keepdim=True), "torch_sum": lambda y: torch.sum(y, dim=1),
    "amax": lambda y: y.amax(1), "amax_axes": lambda y: torch.amax(y, dim=(0, 2)),
    "max_values": lambda y: y.max(1)[0], "max_both": lambda y: y.max(dim=2, keepdim=True),
    "max_named": lambda y: torch.max(y, dim=2).values, "min_indices": lambda y: y.min(1)[1],
    "elementwise_max": lambda y: torch.max(y, -y),
    # functional activations
    "tanh": torch.tanh, "sigmoid": torch.sigmoid, "relu": torch.relu, "F_relu": F.relu, "F_gelu": F.gelu,
    "F_gelu_tanh": lambda y: F.gelu(y, approximate="tanh"), "F_silu": F.silu,
    "F_softmax": lambda y: F.softmax(y, dim=1), "torch_softmax": lambda y: torch.softmax(y, -1),
    "method_softmax": lambda y: y.softmax(-1), "F_log_softmax": lambda y: F.log_softmax(y, dim=-1),
    "F_elu": lambda y: F.elu(y, alpha=0.5), "F_leaky": lambda y: F.leaky_relu(y, 0.1),
    "F_softplus": lambda y: F.softplus(y * 4, beta=2), "F_hardtanh": lambda y: F.hardtanh(y, -0.3, 0.3),
    "exp": torch.exp, "method_sigmoid": lambda y: y.sigmoid().tanh(),
    "F_dropout_eval": lambda y: F.dropout(y, 0.5, training=False),
    # constants
    "zeros": lambda y: torch.zeros((y.size(0), y.size(1), 6)) + y,
    "zeros_like": lambda y: torch.zeros_like(y) + 1,
    "ones_tuple": lambda y: torch.ones((y.size(0), 1, 6)) * y, "new_zeros": lambda y: y.new_zeros(y.shape) - y,
    "full": lambda y: torch.full((y.size(0), 1, 6), 2.5) * y,
}


@pytest.mark.parametrize("name", sorted(CASES))
def test_function(name: str, rng: np.random.Generator) -> None:
    _check3(CASES[name], rng)


def test_sizes_stay_dynamic_through_shape_ops(rng: np.random.Generator) -> None:
    model = _check3(CASES["reshape_size"], rng)
    ops = [n.op_type for n in model.graph.node]
    assert "Shape" in ops and "Reshape" in ops


class RecurrentIdioms(tnn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.rnn = tnn.LSTM(5, 4, num_layers=2, bidirectional=True, batch_first=True)
        self.hidden = 4

    def forward(self, x: torch.Tensor) -> Any:
        out, (h, c) = self.rnn(x)
        fwd, bwd = out[:, :, : self.hidden], out[:, :, self.hidden:]
        last = torch.cat([h[-2], h[-1]], dim=1)
        return fwd[:, -1] + bwd[:, 0], last, c.permute(1, 0, 2).reshape(x.size(0), -1)


def test_recurrent_output_idioms(rng: np.random.Generator) -> None:
    m = randomize(RecurrentIdioms())
    model = export(m)
    for n, t in ((1, 3), (4, 10)):
        feeds = {"x": rand(rng, n, t, 5)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))


class Unsupported(tnn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.lin = tnn.Linear(6, 6)
        self.attn = tnn.MultiheadAttention(6, 2)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = self.lin(x)
        z = torch.cumsum(y, dim=1)
        w = torch.fft.fft(z).real
        a, _ = self.attn(y, y, y)
        return w + F.dropout(y, 0.1) + a


def test_every_unsupported_node_is_listed_with_its_line() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(Unsupported())
    msg = str(e.value)
    assert "torch.cumsum" in msg and "torch.fft.fft_fft" in msg and "attn (MultiheadAttention)" in msg
    assert "test_torch_functions.py:" in msg and "`z = torch.cumsum(y, dim=1)`" in msg
    assert "torch.nn.functional.dropout" in msg and "training=True" in msg
    assert e.value.exit_code == 3


def test_squeeze_of_dynamic_dim_is_refused() -> None:
    with pytest.raises(UnsupportedModelError, match="squeeze of dim 0"):
        export(linear_then(lambda y: y.squeeze()), inputs=["x:batch,time,6"])


def test_bool_mask_index_is_refused() -> None:
    # a one-axis int tensor index is exported (tests/export/test_torch_choices.py); a mask is not
    with pytest.raises(UnsupportedModelError, match="bool mask"):
        export(linear_then(lambda y: y[y > 0]), inputs=["x:batch,6"])


class TutorialLSTM(tnn.Module):
    """The common hand-written pattern: zero initial states sized from the input, moved to its device."""

    def __init__(self) -> None:
        super().__init__()
        self.num_layers, self.hidden_size = 2, 6
        self.lstm = tnn.LSTM(5, self.hidden_size, self.num_layers, batch_first=True, dropout=0.2)
        self.dropout = tnn.Dropout(0.1)
        self.fc = tnn.Linear(self.hidden_size, 3)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        batch_size = x.shape[0]
        h0 = torch.zeros(self.num_layers, batch_size, self.hidden_size).to(x.device)
        c0 = torch.zeros((self.num_layers, x.size(0), self.hidden_size), device=x.device)
        out, _ = self.lstm(x, (h0, c0))
        out = self.dropout(out[:, -1, :])
        return F.log_softmax(self.fc(out), dim=1)


def test_tutorial_pattern_with_zero_states(rng: np.random.Generator) -> None:
    m = randomize(TutorialLSTM())
    model = export(m)
    for n, t in ((1, 2), (4, 11)):
        feeds = {"x": rand(rng, n, t, 5)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))
    assert [i.name for i in model.graph.input] == ["x"]


def test_zeros_with_traced_leading_size_exports_with_a_dynamic_batch(rng: np.random.Generator) -> None:
    # fx alone refuses torch.zeros(size, 6); the value-carrying capture records it with the size
    # kept dynamic (proved by tracing at two batch sizes), so it exports
    m = linear_then(lambda y: torch.zeros(y.size(0), 6) + y)
    model = export(m, inputs=["x:batch,6"])
    for n in (1, 5):
        feeds = {"x": rand(rng, n, 6)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))


class HiddenPair(tnn.Module):
    """forward(x, hidden) with hidden = (h0, c0) passed whole to the LSTM."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = tnn.LSTM(5, 6, num_layers=2)

    def forward(self, x: torch.Tensor, hidden: tuple[torch.Tensor, torch.Tensor]) -> Any:
        out, hidden = self.lstm(x, hidden)
        return out[-1], hidden


def test_state_pair_argument_becomes_two_inputs(rng: np.random.Generator) -> None:
    m = randomize(HiddenPair())
    model = export(m)
    assert [i.name for i in model.graph.input] == ["x", "hidden_0", "hidden_1"]
    x, h, c = rand(rng, 7, 3, 5), rand(rng, 2, 3, 6), rand(rng, 2, 3, 6)
    with torch.no_grad():
        ref = m(torch.from_numpy(x), (torch.from_numpy(h), torch.from_numpy(c)))
    got = run_onnx(model, {"x": x, "hidden_0": h, "hidden_1": c})
    worst([ref[0].numpy(), ref[1][0].numpy(), ref[1][1].numpy()], got)


@pytest.mark.parametrize("name", ["clamp", "clip_min", "pad_last", "pad_two", "pad_value"])
def test_clamp_and_pad(name: str, rng: np.random.Generator) -> None:
    fns = {"clamp": lambda y: torch.clamp(y, -0.2, 0.3), "clip_min": lambda y: y.clip(min=0.1),
           "pad_last": lambda y: F.pad(y, (1, 2)), "pad_two": lambda y: F.pad(y, (0, 1, 2, 0)),
           "pad_value": lambda y: F.pad(y, (3, 0), value=-1.5)}
    _check3(fns[name], rng)


class Univariate(tnn.Module):
    """[batch, time] series → unsqueeze(-1) → LSTM(1, H): the input spec is inferred through the unsqueeze."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = tnn.LSTM(1, 6, batch_first=True)
        self.fc = tnn.Linear(6, 1)

    def forward(self, series: torch.Tensor) -> torch.Tensor:
        out, _ = self.lstm(series.unsqueeze(-1))
        return self.fc(out[:, -1]).squeeze(-1)


def test_input_spec_inferred_through_layout_changes(rng: np.random.Generator) -> None:
    from torch_models import nn

    m = randomize(Univariate())
    model = export(m)
    dims = [d.dim_param or d.dim_value for d in model.graph.input[0].type.tensor_type.shape.dim]
    assert dims == ["batch", "time"]
    feeds = {"series": rand(rng, 3, 12)}
    worst(torch_outputs(m, feeds), run_onnx(model, feeds))
    enc = export(randomize(nn().Encoder()))  # x.transpose(1, 2) into Conv1d(4, ...)
    dims = [d.dim_param or d.dim_value for d in enc.graph.input[0].type.tensor_type.shape.dim]
    assert dims == ["batch", "time", 4]


class InPlace(tnn.Module):
    def __init__(self, style: str) -> None:
        super().__init__()
        self.lin = tnn.Linear(6, 6)
        self.act = tnn.ReLU(inplace=True)
        self.style = style

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = self.lin(x)
        if self.style == "chained":  # same program as the out-of-place form: exported
            y = torch.sigmoid_(self.act(y).tanh_().mul_(2))
            return F.relu(y, inplace=True)
        if self.style == "statement":  # the mutation is not the result: refused
            y.relu_()
            return y
        z = y[:, :3]
        z.mul_(2)  # writes through a view into y
        return y


def test_inplace_chain_is_exported(rng: np.random.Generator) -> None:
    m = randomize(InPlace("chained"))
    feeds = {"x": rand(rng, 4, 6)}
    worst(torch_outputs(m, feeds), run_onnx(export(m), feeds))


@pytest.mark.parametrize("style", ["statement", "view"])
def test_inplace_mutation_is_refused(style: str) -> None:
    with pytest.raises(UnsupportedModelError, match="in-place operation") as e:
        export(randomize(InPlace(style)))
    assert ("Tensor.relu_" if style == "statement" else "Tensor.mul_") in str(e.value)
