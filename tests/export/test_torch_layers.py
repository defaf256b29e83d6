"""Non-recurrent torch.nn modules: each exported and matched against torch by onnxruntime.

The reference is torch itself (the source framework); hand-worked values pin the two
formulas that are not a single ONNX op (Softplus's linear branch, Conv1d 'same' padding).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn as tnn

from seqgate.errors import UnsupportedModelError
from torch_models import check, export, nn, rand, randomize, run_onnx, torch_outputs, worst

torch.set_num_threads(1)


def _seq(*mods: tnn.Module) -> tnn.Module:
    return randomize(tnn.Sequential(*mods), seed=len(mods))


@pytest.mark.parametrize("bias", [True, False])
def test_linear(bias: bool, rng: np.random.Generator) -> None:
    m = _seq(tnn.Linear(6, 4, bias=bias))
    check(m, {"input": rand(rng, 3, 6)})
    check(m, {"input": rand(rng, 2, 5, 6)}, inputs=["input:batch,time,6"])


def test_embedding_input_is_int64(rng: np.random.Generator) -> None:
    m = _seq(tnn.Embedding(12, 5, padding_idx=0), tnn.Linear(5, 3))
    model = export(m)
    assert model.graph.input[0].type.tensor_type.elem_type == 7  # TensorProto.INT64
    ids = rng.integers(0, 12, (3, 9)).astype(np.int64)
    worst(torch_outputs(m, {"input": ids}), run_onnx(model, {"input": ids}))


def test_embedding_max_norm_is_refused() -> None:
    with pytest.raises(UnsupportedModelError, match="max_norm"):
        export(_seq(tnn.Embedding(12, 5, max_norm=1.0)))


@pytest.mark.parametrize("kw", [
    {"kernel_size": 3}, {"kernel_size": 3, "padding": 2}, {"kernel_size": 3, "padding": "same"},
    {"kernel_size": 4, "padding": "same"}, {"kernel_size": 4, "padding": "same", "dilation": 3},
    {"kernel_size": 3, "padding": "valid", "stride": 2}, {"kernel_size": 5, "dilation": 2, "padding": 1},
    {"kernel_size": 3, "groups": 2, "bias": False}, {"kernel_size": 2, "stride": 3, "padding": 1, "groups": 4},
])
def test_conv1d(kw: dict, rng: np.random.Generator) -> None:
    m = _seq(tnn.Conv1d(4, 8, **kw))
    model = export(m)
    for n, t in ((1, 20), (3, 31)):
        feeds = {"input": rand(rng, n, 4, t)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))


def test_conv1d_same_even_kernel_pads_the_extra_step_on_the_right() -> None:
    """Hand-worked: kernel [1, 0, 0, 0] with 'same' (total pad 3 = 1 left + 2 right) shifts x right by 1."""
    conv = tnn.Conv1d(1, 1, 4, padding="same", bias=False)
    with torch.no_grad():
        conv.weight.copy_(torch.tensor([[[1.0, 0.0, 0.0, 0.0]]]))
    x = np.arange(1, 7, dtype=np.float32).reshape(1, 1, 6)
    m = tnn.Sequential(conv).eval()
    (got,) = run_onnx(export(m), {"input": x})
    np.testing.assert_array_equal(torch_outputs(m, {"input": x})[0][0, 0], [0, 1, 2, 3, 4, 5])
    np.testing.assert_array_equal(got[0, 0], [0, 1, 2, 3, 4, 5])


def test_conv1d_padding_mode_is_refused() -> None:
    with pytest.raises(UnsupportedModelError, match="padding_mode='reflect'"):
        export(_seq(tnn.Conv1d(4, 4, 3, padding=1, padding_mode="reflect")))


@pytest.mark.parametrize("kw", [{}, {"elementwise_affine": False}, {"bias": False}])
def test_layer_norm(kw: dict, rng: np.random.Generator) -> None:
    check(_seq(tnn.Linear(6, 6), tnn.LayerNorm(6, eps=1e-3, **kw)), {"input": rand(rng, 4, 6) * 3})


def test_layer_norm_over_two_axes(rng: np.random.Generator) -> None:
    m = _seq(tnn.Linear(6, 6), tnn.LayerNorm([5, 6]))
    check(m, {"input": rand(rng, 2, 5, 6)}, inputs=["input:batch,5,6"])


@pytest.mark.parametrize("shape", [(5, 6), (3, 6, 7)])
@pytest.mark.parametrize("affine", [True, False])
def test_batch_norm1d(shape: tuple, affine: bool, rng: np.random.Generator) -> None:
    m = _seq(tnn.BatchNorm1d(6, affine=affine))
    dims = "batch,6" if len(shape) == 2 else "batch,6,time"
    check(m, {"input": rand(rng, *shape)}, inputs=[f"input:{dims}"])


def test_batch_norm_without_running_stats_is_refused() -> None:
    with pytest.raises(UnsupportedModelError, match="track_running_stats=False"):
        export(_seq(tnn.Linear(3, 6), tnn.BatchNorm1d(6, track_running_stats=False)))


@pytest.mark.parametrize("drop", [tnn.Dropout(0.5), tnn.Dropout1d(0.5), tnn.AlphaDropout(0.5),
                                  tnn.FeatureAlphaDropout(0.5), tnn.Identity()])
def test_dropout_and_identity_are_inert(drop: tnn.Module, rng: np.random.Generator) -> None:
    check(_seq(tnn.Conv1d(3, 4, 1), drop, tnn.Flatten()), {"input": rand(rng, 2, 3, 5)})


@pytest.mark.parametrize(("start", "end"), [(1, -1), (0, 1), (1, 2), (0, -1), (2, 2)])
def test_flatten(start: int, end: int, rng: np.random.Generator) -> None:
    m = _seq(tnn.Linear(4, 4), tnn.Flatten(start, end))
    model = export(m, inputs=["input:batch,time,4"])
    for n, t in ((1, 3), (2, 7)):
        feeds = {"input": rand(rng, n, t, 4)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))


ACTIVATIONS = [
    tnn.ReLU(), tnn.Tanh(), tnn.Sigmoid(), tnn.GELU(), tnn.GELU(approximate="tanh"), tnn.SiLU(),
    tnn.ELU(alpha=0.7), tnn.LeakyReLU(0.2), tnn.Softplus(), tnn.Softplus(beta=2.0, threshold=1.0),
    tnn.Softplus(beta=0.5, threshold=5.0), tnn.Softmax(dim=1), tnn.Softmax(dim=0), tnn.LogSoftmax(dim=-1),
    tnn.Hardtanh(-0.5, 0.8), tnn.Hardtanh(), tnn.ReLU6(), tnn.SELU(), tnn.Mish(), tnn.Softsign(),
    tnn.Hardsigmoid(), tnn.Hardswish(), tnn.LogSigmoid(),
]


@pytest.mark.parametrize("act", ACTIVATIONS, ids=lambda a: repr(a))
def test_activation_modules(act: tnn.Module, rng: np.random.Generator) -> None:
    m = _seq(tnn.Linear(6, 6), act)
    check(m, {"input": rand(rng, 5, 6) * 8})  # wide range: tails and thresholds are exercised


def test_softplus_linear_branch_hand_worked() -> None:
    """torch Softplus(β=2, threshold=1): x if 2x > 1 else log(1 + e^{2x})/2 (PyTorch docs)."""
    lin = tnn.Linear(1, 1)
    with torch.no_grad():
        lin.weight.fill_(1.0)
        lin.bias.fill_(0.0)
    x = np.array([[0.0], [0.5], [0.6], [3.0]], np.float32)
    (got,) = run_onnx(export(tnn.Sequential(lin, tnn.Softplus(beta=2.0, threshold=1.0))), {"input": x})
    want = [np.log(2.0) / 2, np.log(1 + np.e) / 2, 0.6, 3.0]  # 0.5 is not > threshold/β: log branch
    np.testing.assert_allclose(got[:, 0], want, rtol=1e-6)


def test_softplus_default_threshold_measured(rng: np.random.Generator) -> None:
    """Default Softplus (β=1, threshold=20) over |x| ≤ 40: exact to float32 rounding."""
    lin = tnn.Linear(1, 1)
    with torch.no_grad():
        lin.weight.fill_(1.0)
        lin.bias.fill_(0.0)
    m = tnn.Sequential(lin, tnn.Softplus()).eval()
    x = np.linspace(-40, 40, 4001, dtype=np.float32)[:, None]
    w = worst(torch_outputs(m, {"input": x}), run_onnx(export(m), {"input": x}), atol=1e-6, rtol=1e-6)
    assert w < 1e-5


def test_nested_sequential_and_submodules(rng: np.random.Generator) -> None:
    m = _seq(tnn.Linear(4, 8), tnn.Sequential(tnn.ReLU(), tnn.Sequential(tnn.Linear(8, 8), tnn.Tanh())),
             tnn.Linear(8, 2))
    check(m, {"input": rand(rng, 3, 4)})
    model = export(m)
    docs = {n.doc_string for n in model.graph.node}
    assert "torch layer '1.1.0' (Linear)" in docs  # nested qualified names reach the ONNX nodes


def test_classifier_with_embedding_and_bidirectional_gru(rng: np.random.Generator) -> None:
    m = randomize(nn().Classifier(), seed=1)
    model = export(m)
    for n, t in ((1, 4), (3, 12)):
        ids = rng.integers(0, 20, (n, t)).astype(np.int64)
        worst(torch_outputs(m, {"tokens": ids}), run_onnx(model, {"tokens": ids}))
    assert [o.name for o in model.graph.output] == ["output"]


def test_encoder_with_conv_lstm_norm(rng: np.random.Generator) -> None:
    m = randomize(nn().Encoder(), seed=2)
    model = export(m, inputs=["x:batch,time,4"])
    for n, t in ((1, 5), (2, 17)):
        feeds = {"x": rand(rng, n, t, 4)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))
    assert [o.name for o in model.graph.output] == ["output_0", "output_1"]
    from seqgate.onnxfile.probes import read_probe_map

    assert {p.layer for p in read_probe_map(model)} == {"body.rnn"}


@pytest.mark.parametrize("pool", [
    tnn.MaxPool1d(2), tnn.MaxPool1d(3, stride=2, padding=1), tnn.MaxPool1d(3, stride=1, dilation=2),
    tnn.AvgPool1d(2), tnn.AvgPool1d(3, stride=2, padding=1), tnn.AvgPool1d(3, 2, 1, count_include_pad=False),
    tnn.AdaptiveAvgPool1d(1), tnn.AdaptiveMaxPool1d(1),
], ids=repr)
def test_pooling(pool: tnn.Module, rng: np.random.Generator) -> None:
    m = _seq(tnn.Conv1d(3, 4, 1), pool)
    model = export(m)
    for n, t in ((1, 9), (2, 16)):
        feeds = {"input": rand(rng, n, 3, t)}
        worst(torch_outputs(m, feeds), run_onnx(model, feeds))
