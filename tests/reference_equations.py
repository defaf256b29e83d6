"""NumPy float64 oracles for the ONNX RNN, GRU and LSTM operators, written from the equations.

Sources (each function names its own): the ONNX operator spec (``onnx/docs/Operators.md``,
RNN-14 / GRU-14 / LSTM-14, default ``layout=0``); the LSTM with forget gate of Hochreiter &
Schmidhuber (1997) as extended by Gers, Schmidhuber & Cummins (2000); the GRU of Cho et al.
(2014); the Elman (1990) simple recurrent network. None of this module imports seqgate: it
is an independent computation that tests compare the exported graphs against.

Layout (ONNX spec, ``layout=0``), D directions, G gates (RNN 1, GRU 3, LSTM 4):

- ``X [T, N, I]``, ``W [D, G·H, I]``, ``R [D, G·H, H]``, ``B [D, 2·G·H]`` (= ``[Wb, Rb]``),
  ``initial_h`` / ``initial_c [D, N, H]``, ``P [D, 3H]`` (peepholes ``i, o, f``),
  ``sequence_lens [N]``.
- Gate blocks: LSTM ``i, o, f, c``; GRU ``z, r, h``.
- Returns ``Y [T, D, N, H]``, ``Y_h [D, N, H]`` (and ``Y_c [D, N, H]`` for LSTM). A reverse
  direction walks ``t = len−1 … 0`` but writes ``Y`` in input order, so ``Y[t]`` is the state
  after consuming ``X[t]`` and ``Y_h`` is the state after ``t = 0``.

Activations: each slot is a name (``"Tanh"``) or a ``(name, alpha, beta)`` tuple, one per
slot and direction (LSTM ``f, g, h``; GRU ``f, g``; RNN ``f``), forward slots first. Names
without parameters ignore alpha/beta; names with parameters take the ONNX standalone
operator defaults when given as a bare name. :func:`slots_from_attributes` decodes a node's
``activation_alpha`` / ``activation_beta`` lists the way onnxruntime 1.32 reads them
(measured here: a value is consumed only by an activation that takes that parameter).

``clip`` bounds every gate pre-activation to ``[−clip, clip]`` before its activation
(spec: "applied to the input of activations"). ``sequence_lens`` follows onnxruntime
(FACTS.md, measured): ``Y`` is zero at ``t ≥ len``, the finals hold the last valid step's
state, and ``len = 0`` gives zero finals (not ``initial_h``).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

Array = np.ndarray[Any, Any]
Slot = str | tuple[str, float, float]

# ONNX standalone-operator defaults (alpha, beta) for parameterised activations (spec).
_DEFAULT_PARAMS: dict[str, tuple[float, float]] = {
    "Affine": (1.0, 0.0),
    "LeakyRelu": (0.01, 0.0),
    "ThresholdedRelu": (1.0, 0.0),
    "ScaledTanh": (1.0, 1.0),
    "HardSigmoid": (0.2, 0.5),
    "Elu": (1.0, 0.0),
}
# Which parameters each activation takes (spec; matches what onnxruntime consumes, measured).
TAKES_ALPHA = frozenset({"Affine", "LeakyRelu", "ThresholdedRelu", "ScaledTanh", "HardSigmoid", "Elu"})
TAKES_BETA = frozenset({"Affine", "ScaledTanh", "HardSigmoid"})


def sigmoid(x: Array) -> Array:
    """σ(x) = 1 / (1 + e^−x), computed without overflow for large |x|."""
    return np.where(x >= 0, 1.0 / (1.0 + np.exp(-np.abs(x))), np.exp(-np.abs(x)) / (1.0 + np.exp(-np.abs(x))))


def activation(name: str, alpha: float | None = None, beta: float | None = None) -> Callable[[Array], Array]:
    """The ONNX recurrent-op activation functions (spec, "activation functions" table)."""
    da, db = _DEFAULT_PARAMS.get(name, (0.0, 0.0))
    a = da if alpha is None else float(alpha)
    b = db if beta is None else float(beta)
    table: dict[str, Callable[[Array], Array]] = {
        "Relu": lambda x: np.maximum(x, 0.0),
        "Tanh": np.tanh,
        "Sigmoid": sigmoid,
        "Affine": lambda x: a * x + b,
        "LeakyRelu": lambda x: np.where(x >= 0, x, a * x),
        "ThresholdedRelu": lambda x: np.where(x > a, x, 0.0),
        "ScaledTanh": lambda x: a * np.tanh(b * x),
        "HardSigmoid": lambda x: np.clip(a * x + b, 0.0, 1.0),
        "Elu": lambda x: np.where(x >= 0, x, a * (np.exp(np.minimum(x, 0.0)) - 1.0)),
        "Softsign": lambda x: x / (1.0 + np.abs(x)),
        "Softplus": lambda x: np.logaddexp(0.0, x),
    }
    if name not in table:
        raise ValueError(f"unknown ONNX recurrent activation {name!r}")
    return table[name]


def slots_from_attributes(
    activations: Sequence[str], alpha: Sequence[float] | None, beta: Sequence[float] | None
) -> list[tuple[str, float, float]]:
    """Decode ONNX ``activations``/``activation_alpha``/``activation_beta`` into per-slot tuples.

    Values are consumed in slot order, each only by an activation that takes that parameter
    (how onnxruntime 1.32 reads the lists, measured by tests/test_reference_equations.py).
    """
    al, be = list(alpha or []), list(beta or [])
    out: list[tuple[str, float, float]] = []
    for name in activations:
        da, db = _DEFAULT_PARAMS.get(name, (0.0, 0.0))
        a = al.pop(0) if name in TAKES_ALPHA and al else da
        b = be.pop(0) if name in TAKES_BETA and be else db
        out.append((name, a, b))
    return out


def _resolve(
    slots: Sequence[Slot] | None, defaults: list[str], n_dirs: int
) -> list[list[Callable[[Array], Array]]]:
    given = list(slots) if slots is not None else defaults * n_dirs
    per = len(defaults)
    if len(given) == per:  # one direction's list given for a bidirectional op
        given = given * n_dirs
    if len(given) != per * n_dirs:
        raise ValueError(f"expected {per * n_dirs} activations, got {len(given)}")
    fns = [activation(s) if isinstance(s, str) else activation(*s) for s in given]
    return [fns[d * per:(d + 1) * per] for d in range(n_dirs)]


def _directions(direction: str) -> list[bool]:
    """Per direction: True when it runs backwards in time."""
    return {"forward": [False], "reverse": [True], "bidirectional": [False, True]}[direction]


def _clip(x: Array, clip: float | None) -> Array:
    return x if clip is None else np.clip(x, -clip, clip)


def _scan(
    step: Callable[[int, Array, tuple[Array, ...]], tuple[Array, ...]],
    X: Array,
    init: tuple[Array, ...],
    backwards: bool,
    sequence_lens: Array | None,
) -> tuple[Array, tuple[Array, ...]]:
    """Run ``step`` over time for one direction; apply the ``sequence_lens`` rules per row."""
    T, N = X.shape[0], X.shape[1]
    lens = np.full(N, T) if sequence_lens is None else np.asarray(sequence_lens).astype(int)
    Y = np.zeros((T, N, init[0].shape[-1]))
    finals = tuple(np.zeros_like(s) for s in init)
    for n in range(N):
        state = tuple(s[n:n + 1] for s in init)
        order = range(lens[n] - 1, -1, -1) if backwards else range(lens[n])
        for t in order:
            state = step(t, X[t, n:n + 1], state)
            Y[t, n] = state[0][0]
        if lens[n] > 0:
            for f, s in zip(finals, state, strict=True):
                f[n] = s[0]
    return Y, finals


def _prepare(X: Array, W: Array, R: Array, B: Array | None, gates: int, init: list[Array | None]) -> Any:
    X = np.asarray(X, np.float64)
    W = np.asarray(W, np.float64)
    R = np.asarray(R, np.float64)
    D, gh, _ = W.shape
    H = gh // gates
    B = np.zeros((D, 2 * gh)) if B is None else np.asarray(B, np.float64)
    N = X.shape[1]
    states = [np.zeros((D, N, H)) if s is None else np.asarray(s, np.float64) for s in init]
    return X, W, R, B, H, states


def onnx_rnn(
    X: Array, W: Array, R: Array, B: Array | None = None, sequence_lens: Array | None = None,
    initial_h: Array | None = None, direction: str = "forward",
    activations: Sequence[Slot] | None = None, clip: float | None = None,
) -> tuple[Array, Array]:
    """ONNX RNN (spec RNN-14), the Elman (1990) network: ``H_t = f(X_t·Wᵀ + H_{t−1}·Rᵀ + Wb + Rb)``.

    Default ``f`` is Tanh. Returns ``(Y [T, D, N, H], Y_h [D, N, H])``.
    """
    X, W, R, B, H, (h0,) = _prepare(X, W, R, B, 1, [initial_h])
    acts = _resolve(activations, ["Tanh"], W.shape[0])
    ys, hs = [], []
    for d, back in enumerate(_directions(direction)):
        wb, rb = B[d, :H], B[d, H:]
        (f,) = acts[d]

        def step(t: int, x: Array, s: tuple[Array, ...], d: int = d, wb: Array = wb, rb: Array = rb,
                 f: Callable[[Array], Array] = f) -> tuple[Array, ...]:
            return (f(_clip(x @ W[d].T + s[0] @ R[d].T + wb + rb, clip)),)

        Y, (h,) = _scan(step, X, (h0[d],), back, sequence_lens)
        ys.append(Y)
        hs.append(h)
    return np.stack(ys, axis=1), np.stack(hs)


def onnx_gru(
    X: Array, W: Array, R: Array, B: Array | None = None, sequence_lens: Array | None = None,
    initial_h: Array | None = None, direction: str = "forward",
    activations: Sequence[Slot] | None = None, clip: float | None = None,
    linear_before_reset: int = 0,
) -> tuple[Array, Array]:
    """ONNX GRU (spec GRU-14), the gated unit of Cho et al. (2014), gates ``z, r, h``::

        z_t = f(X_t·Wzᵀ + H_{t−1}·Rzᵀ + Wbz + Rbz)
        r_t = f(X_t·Wrᵀ + H_{t−1}·Rrᵀ + Wbr + Rbr)
        h_t = g(X_t·Whᵀ + (r_t ⊙ H_{t−1})·Rhᵀ + Rbh + Wbh)        linear_before_reset = 0
        h_t = g(X_t·Whᵀ + r_t ⊙ (H_{t−1}·Rhᵀ + Rbh) + Wbh)        linear_before_reset = 1
        H_t = (1 − z_t) ⊙ h_t + z_t ⊙ H_{t−1}

    Defaults ``f`` = Sigmoid, ``g`` = Tanh. Returns ``(Y, Y_h)``.
    """
    X, W, R, B, _, (h0,) = _prepare(X, W, R, B, 3, [initial_h])
    acts = _resolve(activations, ["Sigmoid", "Tanh"], W.shape[0])
    ys, hs = [], []
    for d, back in enumerate(_directions(direction)):
        Wz, Wr, Wh = np.split(W[d], 3)
        Rz, Rr, Rh = np.split(R[d], 3)
        Wbz, Wbr, Wbh, Rbz, Rbr, Rbh = np.split(B[d], 6)
        f, g = acts[d]

        def step(t: int, x: Array, s: tuple[Array, ...], f: Any = f, g: Any = g, Wz: Array = Wz,
                 Wr: Array = Wr, Wh: Array = Wh, Rz: Array = Rz, Rr: Array = Rr, Rh: Array = Rh,
                 Wbz: Array = Wbz, Wbr: Array = Wbr, Wbh: Array = Wbh, Rbz: Array = Rbz,
                 Rbr: Array = Rbr, Rbh: Array = Rbh) -> tuple[Array, ...]:
            hp = s[0]
            z = f(_clip(x @ Wz.T + hp @ Rz.T + Wbz + Rbz, clip))
            r = f(_clip(x @ Wr.T + hp @ Rr.T + Wbr + Rbr, clip))
            if linear_before_reset:
                pre = x @ Wh.T + r * (hp @ Rh.T + Rbh) + Wbh
            else:
                pre = x @ Wh.T + (r * hp) @ Rh.T + Rbh + Wbh
            h = g(_clip(pre, clip))
            return ((1.0 - z) * h + z * hp,)

        Y, (h,) = _scan(step, X, (h0[d],), back, sequence_lens)
        ys.append(Y)
        hs.append(h)
    return np.stack(ys, axis=1), np.stack(hs)


def onnx_lstm(
    X: Array, W: Array, R: Array, B: Array | None = None, sequence_lens: Array | None = None,
    initial_h: Array | None = None, initial_c: Array | None = None, P: Array | None = None,
    direction: str = "forward", activations: Sequence[Slot] | None = None,
    clip: float | None = None, input_forget: bool = False,
) -> tuple[Array, Array, Array]:
    """ONNX LSTM (spec LSTM-14): the LSTM of Hochreiter & Schmidhuber (1997) with the forget
    gate of Gers, Schmidhuber & Cummins (2000) and optional peepholes ``P = [Pi, Po, Pf]``::

        i_t = f(X_t·Wiᵀ + H_{t−1}·Riᵀ + Pi ⊙ C_{t−1} + Wbi + Rbi)
        f_t = f(X_t·Wfᵀ + H_{t−1}·Rfᵀ + Pf ⊙ C_{t−1} + Wbf + Rbf)     (1 − i_t if input_forget)
        c_t = g(X_t·Wcᵀ + H_{t−1}·Rcᵀ + Wbc + Rbc)
        C_t = f_t ⊙ C_{t−1} + i_t ⊙ c_t
        o_t = f(X_t·Woᵀ + H_{t−1}·Roᵀ + Po ⊙ C_t + Wbo + Rbo)
        H_t = o_t ⊙ h(C_t)

    Defaults ``f`` = Sigmoid, ``g`` = ``h`` = Tanh. Returns ``(Y, Y_h, Y_c)``.
    """
    X, W, R, B, H, (h0, c0) = _prepare(X, W, R, B, 4, [initial_h, initial_c])
    D = W.shape[0]
    P = np.zeros((D, 3 * H)) if P is None else np.asarray(P, np.float64)
    acts = _resolve(activations, ["Sigmoid", "Tanh", "Tanh"], D)
    ys, hs, cs = [], [], []
    for d, back in enumerate(_directions(direction)):
        Wi, Wo, Wf, Wc = np.split(W[d], 4)
        Ri, Ro, Rf, Rc = np.split(R[d], 4)
        bi, bo, bf, bc = (a + b for a, b in zip(np.split(B[d, :4 * H], 4), np.split(B[d, 4 * H:], 4),
                                                strict=True))
        Pi, Po, Pf = np.split(P[d], 3)
        f, g, h = acts[d]

        def step(t: int, x: Array, s: tuple[Array, ...], f: Any = f, g: Any = g, h: Any = h,
                 Wi: Array = Wi, Wo: Array = Wo, Wf: Array = Wf, Wc: Array = Wc, Ri: Array = Ri,
                 Ro: Array = Ro, Rf: Array = Rf, Rc: Array = Rc, bi: Array = bi, bo: Array = bo,
                 bf: Array = bf, bc: Array = bc, Pi: Array = Pi, Po: Array = Po,
                 Pf: Array = Pf) -> tuple[Array, ...]:
            hp, cp = s
            i = f(_clip(x @ Wi.T + hp @ Ri.T + Pi * cp + bi, clip))
            if input_forget:
                fg = 1.0 - i
            else:
                fg = f(_clip(x @ Wf.T + hp @ Rf.T + Pf * cp + bf, clip))
            c_new = g(_clip(x @ Wc.T + hp @ Rc.T + bc, clip))
            C = fg * cp + i * c_new
            o = f(_clip(x @ Wo.T + hp @ Ro.T + Po * C + bo, clip))
            return (o * h(C), C)

        Y, (hf, cf) = _scan(step, X, (h0[d], c0[d]), back, sequence_lens)
        ys.append(Y)
        hs.append(hf)
        cs.append(cf)
    return np.stack(ys, axis=1), np.stack(hs), np.stack(cs)


# ----- Keras weights → ONNX layout, written from the Keras gate layout (FACTS.md) ------------
def keras_to_onnx(
    kind: str, kernel: Array, recurrent_kernel: Array, bias: Array | None, reset_after: bool = False
) -> tuple[Array, Array, Array | None]:
    """One Keras direction as ONNX ``(W [1, G·H, I], R [1, G·H, H], B [1, 2·G·H] | None)``.

    Keras keeps ``kernel (I, G·H)`` with gate blocks LSTM ``i, f, c, o`` and GRU ``z, r, h``;
    a GRU with ``reset_after`` keeps a ``(2, 3H)`` bias = [input row; recurrent row]. Written by
    naming each gate block (not from seqgate's permutation table).
    """
    k = np.asarray(kernel, np.float64)
    rk = np.asarray(recurrent_kernel, np.float64)
    H = rk.shape[0]

    def gate(a: Array, name: str, order: str) -> Array:
        j = order.index(name)
        return a[..., j * H:(j + 1) * H]

    keras_order, onnx_order = {"lstm": ("ifco", "iofc"), "gru": ("zrh", "zrh"), "rnn": ("h", "h")}[kind]
    W = np.concatenate([gate(k, g, keras_order).T for g in onnx_order])[None]
    R = np.concatenate([gate(rk, g, keras_order).T for g in onnx_order])[None]
    if bias is None:
        return W, R, None
    bias = np.asarray(bias, np.float64)
    if kind == "gru" and reset_after:
        wb = np.concatenate([gate(bias[0], g, keras_order) for g in onnx_order])
        rb = np.concatenate([gate(bias[1], g, keras_order) for g in onnx_order])
    else:
        wb = np.concatenate([gate(bias, g, keras_order) for g in onnx_order])
        rb = np.zeros_like(wb)
    return W, R, np.concatenate([wb, rb])[None]
