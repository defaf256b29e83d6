"""Packed sequences: pack_padded_sequence → RNN/GRU/LSTM → pad_packed_sequence, exported on ONNX
``sequence_lens``.

Three computations: PyTorch itself; the NumPy equations of ``torch_reference`` run on each row
cut to its own length (PyTorch docs, ``pack_padded_sequence``: each sequence is processed to
its length; ``pad_packed_sequence`` pads the rest with ``padding_value``); and onnxruntime.
Tolerance ``torch_models.ATOL/RTOL``.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

import torch_models as tm
from torch_reference import run_module

V, E, H, F = 20, 6, 5, 3


def _classes() -> dict[str, Any]:
    import torch
    from torch import nn
    from torch.nn.utils.rnn import pack_padded_sequence, pad_packed_sequence

    class TextClassifier(nn.Module):
        """Embedding(padding_idx 0) → packed bidirectional 2-layer LSTM → last valid state → Linear."""

        def __init__(self, enforce_sorted: bool = False, lengths_from_tokens: bool = False) -> None:
            super().__init__()
            self.emb = nn.Embedding(V, E, padding_idx=0)
            self.lstm = nn.LSTM(E, H, num_layers=2, bidirectional=True, batch_first=True)
            self.fc = nn.Linear(2 * H, 3)
            self.enforce_sorted = enforce_sorted
            self.from_tokens = lengths_from_tokens

        def forward(self, tokens: Any, lengths: Any) -> Any:
            if self.from_tokens:
                lengths = (tokens != 0).sum(1)
            packed = pack_padded_sequence(self.emb(tokens), lengths.cpu(), batch_first=True,
                                          enforce_sorted=self.enforce_sorted)
            _, (h, _) = self.lstm(packed)
            return self.fc(torch.cat([h[-2], h[-1]], dim=1))

    class TokensOnly(TextClassifier):
        def __init__(self) -> None:
            super().__init__(lengths_from_tokens=True)

        def forward(self, tokens: Any) -> Any:  # type: ignore[override]
            lengths = (tokens != 0).sum(1)
            packed = nn.utils.rnn.pack_padded_sequence(self.emb(tokens), lengths.cpu(), batch_first=True,
                                                       enforce_sorted=False)
            _, (h, _) = self.lstm(packed)
            return self.fc(torch.cat([h[-2], h[-1]], dim=1))

    class Forecaster(nn.Module):
        """Packed GRU over variable-length readings; per-step head on the padded output, and h_n."""

        def __init__(self, kind: str = "gru", batch_first: bool = True, enforce_sorted: bool = False,
                     total_length: int | None = None, padding_value: float = 0.0, layers: int = 1,
                     bidirectional: bool = False) -> None:
            super().__init__()
            cls = {"gru": nn.GRU, "lstm": nn.LSTM, "rnn": nn.RNN}[kind]
            self.rnn = cls(F, H, num_layers=layers, batch_first=batch_first, bidirectional=bidirectional)
            self.bf, self.es, self.total, self.pv = batch_first, enforce_sorted, total_length, padding_value
            self.lstm = kind == "lstm"

        def forward(self, x: Any, lengths: Any) -> Any:
            packed = pack_padded_sequence(x, lengths, batch_first=self.bf, enforce_sorted=self.es)
            out, h = self.rnn(packed)
            y, _ = pad_packed_sequence(out, batch_first=self.bf, padding_value=self.pv, total_length=self.total)
            return y, (h[0] if self.lstm else h)

    return {"TextClassifier": TextClassifier, "TokensOnly": TokensOnly, "Forecaster": Forecaster}


def _close(got: list[Any], ref: list[Any], what: str) -> None:
    tm.worst(ref, got)  # asserts |got − ref| <= ATOL + RTOL·|ref| and equal shapes


def _torch(module: Any, *args: Any) -> list[np.ndarray[Any, Any]]:
    import torch

    with torch.no_grad():
        out = module(*[torch.from_numpy(a) for a in args])
    outs = out if isinstance(out, tuple) else (out,)
    return [o.numpy() for o in outs]


def _lengths(rng: np.random.Generator, n: int, t: int, sort: bool) -> np.ndarray[Any, Any]:
    lengths = rng.integers(1, t + 1, size=n)
    lengths[rng.integers(n)] = t
    lengths[(rng.integers(n) + 1) % n] = 1  # a length-1 row
    return np.sort(lengths)[::-1].copy() if sort else lengths


def _tokens(rng: np.random.Generator, lengths: np.ndarray[Any, Any], t: int) -> np.ndarray[Any, Any]:
    """Right-padded ids: 1..V−1 for the first lengths[n] steps, the padding index 0 after."""
    ids = rng.integers(1, V, size=(len(lengths), t))
    return np.where(np.arange(t)[None] < lengths[:, None], ids, 0).astype(np.int64)


@pytest.mark.parametrize("kind", ["gru", "lstm", "rnn"])
@pytest.mark.parametrize("batch_first", [True, False])
@pytest.mark.parametrize("enforce_sorted", [True, False])
@pytest.mark.parametrize("total_length", [None, 20])  # > the sample runs' time sizes (13, 17)
def test_packed_forecaster_matches_torch_and_per_row_equations(
        kind: str, batch_first: bool, enforce_sorted: bool, total_length: int | None) -> None:
    rng = np.random.default_rng(2)
    bidirectional = kind == "lstm"
    m = _classes()["Forecaster"](kind, batch_first, enforce_sorted, total_length,
                                 padding_value=-1.5 if kind == "rnn" else 0.0,
                                 layers=2 if kind != "rnn" else 1, bidirectional=bidirectional)
    m = tm.randomize(m, seed=3)
    onnx_model = tm.export(m)
    n, t = 5, 9
    lengths = _lengths(rng, n, t, sort=enforce_sorted)
    x = rng.normal(size=(n, t, F) if batch_first else (t, n, F)).astype(np.float32)
    ref = _torch(m, x, lengths)
    got = tm.run_onnx(onnx_model, {"x": x, "lengths": lengths})
    _close(got, ref, f"packed {kind}")
    # PyTorch docs (pack_padded_sequence / pad_packed_sequence): row n = the module run on its
    # own first lengths[n] steps; padded steps hold padding_value; h_n = the last valid state.
    params = {k: v.detach().numpy() for k, v in m.rnn.state_dict().items()}
    xb = x if batch_first else x.transpose(1, 0, 2)
    y = got[0] if batch_first else got[0].transpose(1, 0, 2)
    assert y.shape[1] == (total_length or int(lengths.max()))
    for row in range(n):
        ln = int(lengths[row])
        r = run_module(kind, params, xb[row:row + 1, :ln], m.rnn.num_layers, bidirectional, True)
        _close([y[row:row + 1, :ln], got[1][:, row]], [r["output"], r["h_n"][:, 0]], f"row {row}")
        assert (y[row, ln:] == np.float32(m.pv)).all()


@pytest.mark.parametrize("enforce_sorted", [True, False])
def test_packed_text_classifier(enforce_sorted: bool) -> None:
    rng = np.random.default_rng(4)
    m = tm.randomize(_classes()["TextClassifier"](enforce_sorted), seed=5)
    onnx_model = tm.export(m)
    lengths = _lengths(rng, 6, 12, sort=enforce_sorted)
    tokens = _tokens(rng, lengths, 12)
    _close(tm.run_onnx(onnx_model, {"tokens": tokens, "lengths": lengths}), _torch(m, tokens, lengths),
                    "text classifier")


def test_lengths_from_padding_index() -> None:
    """``lengths = (tokens != 0).sum(1)`` inside forward: right-padded token windows."""
    rng = np.random.default_rng(6)
    m = tm.randomize(_classes()["TokensOnly"](), seed=7)
    onnx_model = tm.export(m)
    lengths = _lengths(rng, 4, 10, sort=False)
    tokens = _tokens(rng, lengths, 10)
    _close(tm.run_onnx(onnx_model, {"tokens": tokens}), _torch(m, tokens), "tokens only")


def test_length_zero_gives_padding_and_zero_states() -> None:
    """PyTorch refuses length 0; the export gives padding_value and zero final states for that row
    (ONNX operator spec: sequence_lens; onnxruntime: len 0 → zero Y_h, FACTS.md)."""
    import torch

    m = tm.randomize(_classes()["Forecaster"]("gru", padding_value=2.0), seed=8)
    x = np.random.default_rng(9).normal(size=(3, 6, F)).astype(np.float32)
    lengths = np.array([6, 0, 3], np.int64)
    with pytest.raises((RuntimeError, ValueError)):
        _torch(m, x, lengths)
    y, h = tm.run_onnx(tm.export(m), {"x": x, "lengths": lengths})
    assert (y[1] == 2.0).all() and (h[:, 1] == 0).all()
    ok = _torch(m, x[[0, 2]], lengths[[0, 2]])
    _close([y[[0, 2]], h[:, [0, 2]]], ok, "rows with a length")
    del torch


def test_exporting_a_packed_model_leaves_later_traces_working() -> None:
    """Regression: fx's autowrap must not leave a process-wide patch entry behind."""
    m = tm.randomize(_classes()["Forecaster"]("gru"), seed=1)
    tm.export(m)
    tm.export(m)
    from torch import nn

    plain = tm.randomize(nn.Sequential(nn.Linear(F, H)), seed=2)
    assert tm.export(plain).graph.node  # a module without packing still traces (it failed with KeyError)
