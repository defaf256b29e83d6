"""NumPy float64 reading of ``torch.nn.RNN`` / ``GRU`` / ``LSTM`` in PyTorch's own weight layout.

Written straight from the equations in the PyTorch documentation (pages ``torch.nn.RNN``,
``torch.nn.GRU``, ``torch.nn.LSTM``), not from seqgate's gate tables, so that the gate
reordering done by the export is checked by an independent computation. Imports no seqgate.

Layout (PyTorch docs): ``weight_ih_l{k}[_reverse]`` stacks the input-to-hidden matrices of the
gates row-wise — LSTM ``(W_ii | W_if | W_ig | W_io)``, GRU ``(W_ir | W_iz | W_in)``, RNN
``W_ih`` — and ``weight_hh_l{k}`` the hidden-to-hidden ones in the same order; ``bias_ih`` /
``bias_hh`` likewise. Layer ``k > 0`` reads the concatenated ``[forward | reverse]`` outputs of
layer ``k − 1`` (dropout is off in eval mode). ``h_n`` is ``[L·D, N, H]``, layer-major with
the forward direction first in each layer.
"""

from __future__ import annotations

from typing import Any

import numpy as np

Array = np.ndarray[Any, Any]


def sigmoid(x: Array) -> Array:
    """σ(x) = 1 / (1 + e^−x), without overflow."""
    e = np.exp(-np.abs(x))
    return np.where(x >= 0, 1.0 / (1.0 + e), e / (1.0 + e))


def lstm_step(
    x: Array, h: Array, c: Array, w_ih: Array, w_hh: Array, b_ih: Array, b_hh: Array
) -> tuple[Array, Array]:
    """One step, PyTorch docs (torch.nn.LSTM)::

        i_t = σ(W_ii x_t + b_ii + W_hi h_{t−1} + b_hi)
        f_t = σ(W_if x_t + b_if + W_hf h_{t−1} + b_hf)
        g_t = tanh(W_ig x_t + b_ig + W_hg h_{t−1} + b_hg)
        o_t = σ(W_io x_t + b_io + W_ho h_{t−1} + b_ho)
        c_t = f_t ⊙ c_{t−1} + i_t ⊙ g_t
        h_t = o_t ⊙ tanh(c_t)
    """
    W_ii, W_if, W_ig, W_io = np.split(w_ih, 4)
    W_hi, W_hf, W_hg, W_ho = np.split(w_hh, 4)
    b_ii, b_if, b_ig, b_io = np.split(b_ih, 4)
    b_hi, b_hf, b_hg, b_ho = np.split(b_hh, 4)
    i = sigmoid(x @ W_ii.T + b_ii + h @ W_hi.T + b_hi)
    f = sigmoid(x @ W_if.T + b_if + h @ W_hf.T + b_hf)
    g = np.tanh(x @ W_ig.T + b_ig + h @ W_hg.T + b_hg)
    o = sigmoid(x @ W_io.T + b_io + h @ W_ho.T + b_ho)
    c_new = f * c + i * g
    return o * np.tanh(c_new), c_new


def gru_step(x: Array, h: Array, w_ih: Array, w_hh: Array, b_ih: Array, b_hh: Array) -> Array:
    """One step, PyTorch docs (torch.nn.GRU)::

        r_t = σ(W_ir x_t + b_ir + W_hr h_{t−1} + b_hr)
        z_t = σ(W_iz x_t + b_iz + W_hz h_{t−1} + b_hz)
        n_t = tanh(W_in x_t + b_in + r_t ⊙ (W_hn h_{t−1} + b_hn))
        h_t = (1 − z_t) ⊙ n_t + z_t ⊙ h_{t−1}
    """
    W_ir, W_iz, W_in = np.split(w_ih, 3)
    W_hr, W_hz, W_hn = np.split(w_hh, 3)
    b_ir, b_iz, b_in = np.split(b_ih, 3)
    b_hr, b_hz, b_hn = np.split(b_hh, 3)
    r = sigmoid(x @ W_ir.T + b_ir + h @ W_hr.T + b_hr)
    z = sigmoid(x @ W_iz.T + b_iz + h @ W_hz.T + b_hz)
    n = np.tanh(x @ W_in.T + b_in + r * (h @ W_hn.T + b_hn))
    return (1.0 - z) * n + z * h


def rnn_step(x: Array, h: Array, w_ih: Array, w_hh: Array, b_ih: Array, b_hh: Array, relu: bool) -> Array:
    """One step, PyTorch docs (torch.nn.RNN): ``h_t = tanh(x_t W_ihᵀ + b_ih + h_{t−1} W_hhᵀ + b_hh)``
    (ReLU instead of tanh for ``nonlinearity='relu'``)."""
    pre = x @ w_ih.T + b_ih + h @ w_hh.T + b_hh
    return np.maximum(pre, 0.0) if relu else np.tanh(pre)


def run_module(
    kind: str,
    params: dict[str, Array],
    x: Array,
    num_layers: int,
    bidirectional: bool,
    batch_first: bool,
    relu: bool = False,
    h0: Array | None = None,
    c0: Array | None = None,
) -> dict[str, Any]:
    """Run a whole module from its ``state_dict`` (as NumPy) in float64.

    Returns ``output`` (same batch/time order as ``x``), ``h_n`` / ``c_n`` ``[L·D, N, H]``, and
    ``seq[(k, d)]`` = layer k, direction d hidden states ``[N, T, H]`` (index t = state after
    consuming input position t, for either direction).
    """
    xs = np.asarray(x, np.float64)
    if not batch_first:
        xs = xs.transpose(1, 0, 2)  # → [N, T, I]
    n, t_len, _ = xs.shape
    d_count = 2 if bidirectional else 1
    hidden = params["weight_hh_l0"].shape[1]
    h_init = np.zeros((num_layers * d_count, n, hidden)) if h0 is None else np.asarray(h0, np.float64)
    c_init = np.zeros_like(h_init) if c0 is None else np.asarray(c0, np.float64)
    hs, cs, seq = [], [], {}
    layer_in = xs
    for k in range(num_layers):
        outs = []
        for d in range(d_count):
            sfx = "_reverse" if d else ""
            p = {name: np.asarray(params[f"{name}_l{k}{sfx}"], np.float64) if f"{name}_l{k}{sfx}" in params
                 else None for name in ("weight_ih", "weight_hh", "bias_ih", "bias_hh")}
            g = p["weight_ih"].shape[0]
            b_ih = p["bias_ih"] if p["bias_ih"] is not None else np.zeros(g)
            b_hh = p["bias_hh"] if p["bias_hh"] is not None else np.zeros(g)
            h, c = h_init[k * d_count + d], c_init[k * d_count + d]
            ys = np.zeros((n, t_len, hidden))
            steps = range(t_len - 1, -1, -1) if d else range(t_len)
            for t in steps:
                xt = layer_in[:, t]
                if kind == "lstm":
                    h, c = lstm_step(xt, h, c, p["weight_ih"], p["weight_hh"], b_ih, b_hh)
                elif kind == "gru":
                    h = gru_step(xt, h, p["weight_ih"], p["weight_hh"], b_ih, b_hh)
                else:
                    h = rnn_step(xt, h, p["weight_ih"], p["weight_hh"], b_ih, b_hh, relu)
                ys[:, t] = h
            seq[(k, d)] = ys
            outs.append(ys)
            hs.append(h)
            cs.append(c)
        layer_in = np.concatenate(outs, axis=-1)
    out = layer_in if batch_first else layer_in.transpose(1, 0, 2)
    return {"output": out, "h_n": np.stack(hs), "c_n": np.stack(cs), "seq": seq}
