"""Framework weights → ONNX RNN/GRU/LSTM weight layout. Pure NumPy; holds the gate-order table.

ONNX layout (operator spec, default ``layout=0``): ``W [D, G·H, I]``, ``R [D, G·H, H]``,
``B [D, 2·G·H]`` = input biases of all gates then recurrence biases of all gates. Gate blocks
are ordered LSTM ``i, o, f, c``; GRU ``z, r, h``; RNN one block.

Frameworks (FACTS.md, checked by the equivalence tests):

- Keras stores ``kernel (I, G·H)`` and ``recurrent_kernel (H, G·H)`` (transpose to ONNX),
  LSTM gates ``i, f, c, o``, GRU ``z, r, h``. GRU ``reset_after=True`` keeps a ``(2, 3H)``
  bias (input row, recurrent row) and means ``linear_before_reset=1``.
- PyTorch stores ``weight_ih (G·H, I)``, ``weight_hh (G·H, H)`` (already ``[out, in]``), LSTM
  gates ``i, f, g, o`` (g is ONNX c), GRU ``r, z, n`` (n is ONNX h), with
  ``n = tanh(W_in x + b_in + r ⊙ (W_hn h + b_hn))`` → ``linear_before_reset=1``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

Array = np.ndarray[Any, Any]

GATE_COUNT = {"rnn": 1, "gru": 3, "lstm": 4}
ONNX_OP = {"rnn": "RNN", "gru": "GRU", "lstm": "LSTM"}

# The one table of gate orders: each framework's block order, in ONNX gate letters.
ONNX_GATE_ORDER = {"lstm": "iofc", "gru": "zrh", "rnn": "h"}
FRAMEWORK_GATE_ORDER = {
    ("keras", "lstm"): "ifco",
    ("keras", "gru"): "zrh",
    ("keras", "rnn"): "h",
    ("torch", "lstm"): "ifco",  # torch calls the candidate gate g
    ("torch", "gru"): "rzh",  # torch calls the candidate gate n
    ("torch", "rnn"): "h",
}


def block_permutation(framework: str, kind: str) -> list[int]:
    """Indices of the framework's gate blocks in ONNX order (Keras LSTM → [0, 3, 1, 2])."""
    src = FRAMEWORK_GATE_ORDER[(framework, kind)]
    return [src.index(g) for g in ONNX_GATE_ORDER[kind]]


def reorder_blocks(a: Array, perm: list[int], axis: int) -> Array:
    """Split ``a`` into ``len(perm)`` equal blocks along ``axis`` and reorder them."""
    blocks = np.split(a, len(perm), axis=axis)
    return np.concatenate([blocks[i] for i in perm], axis=axis)


@dataclass(frozen=True)
class Packed:
    """ONNX-ready weights for one recurrent op (``B`` is None when the layer has no bias)."""

    W: Array
    R: Array
    B: Array | None
    linear_before_reset: int = 0
    P: Array | None = None  # LSTM peepholes [D, 3H], order i, o, f (ONNX spec); None = no P input

    @property
    def directions(self) -> int:
        return int(self.W.shape[0])


def keras_weights(
    kind: str,
    kernel: Array,
    recurrent_kernel: Array,
    bias: Array | None,
    reset_after: bool = False,
) -> Packed:
    """One Keras direction → ``Packed`` with D = 1.

    ``W = reorder(kernel)ᵀ``, ``R = reorder(recurrent_kernel)ᵀ``; the bias becomes the input
    half of ``B`` with a zero recurrence half, except GRU ``reset_after`` whose two bias rows
    fill both halves.
    """
    perm = block_permutation("keras", kind)
    w = reorder_blocks(np.asarray(kernel, np.float32), perm, axis=1).T
    r = reorder_blocks(np.asarray(recurrent_kernel, np.float32), perm, axis=1).T
    b: Array | None = None
    lbr = 0
    if kind == "gru" and reset_after:
        lbr = 1
        if bias is not None:
            bias = np.asarray(bias, np.float32)
            if bias.shape != (2, w.shape[0]):
                raise ValueError(f"GRU reset_after bias has shape {bias.shape}, expected (2, 3H)")
            b = np.concatenate([reorder_blocks(bias[0], perm, 0), reorder_blocks(bias[1], perm, 0)])
    elif bias is not None:
        bias = np.asarray(bias, np.float32).reshape(-1)
        b = np.concatenate([reorder_blocks(bias, perm, 0), np.zeros_like(bias)])
    return Packed(
        W=np.ascontiguousarray(w[None]),
        R=np.ascontiguousarray(r[None]),
        B=None if b is None else np.ascontiguousarray(b[None]),
        linear_before_reset=lbr,
    )


def torch_weights(
    kind: str,
    weight_ih: Array,
    weight_hh: Array,
    bias_ih: Array | None,
    bias_hh: Array | None,
) -> Packed:
    """One PyTorch layer-direction → ``Packed`` with D = 1; ``B = [b_ih, b_hh]`` reordered."""
    perm = block_permutation("torch", kind)
    w = reorder_blocks(np.asarray(weight_ih, np.float32), perm, axis=0)
    r = reorder_blocks(np.asarray(weight_hh, np.float32), perm, axis=0)
    b: Array | None = None
    if bias_ih is not None or bias_hh is not None:
        gh = w.shape[0]
        bi = np.zeros(gh, np.float32) if bias_ih is None else np.asarray(bias_ih, np.float32)
        bh = np.zeros(gh, np.float32) if bias_hh is None else np.asarray(bias_hh, np.float32)
        b = np.concatenate([reorder_blocks(bi, perm, 0), reorder_blocks(bh, perm, 0)])
    return Packed(
        W=np.ascontiguousarray(w[None]),
        R=np.ascontiguousarray(r[None]),
        B=None if b is None else np.ascontiguousarray(b[None]),
        linear_before_reset=1 if kind == "gru" else 0,
    )


def stack_directions(parts: list[Packed]) -> Packed:
    """Concatenate per-direction ``Packed`` (forward first) along the D axis."""
    if len({p.linear_before_reset for p in parts}) != 1:
        raise ValueError("directions disagree on linear_before_reset")
    has_b = [p.B is not None for p in parts]
    if any(has_b) and not all(has_b):
        raise ValueError("one direction has a bias and the other not")
    return Packed(
        W=np.concatenate([p.W for p in parts]),
        R=np.concatenate([p.R for p in parts]),
        B=None if parts[0].B is None else np.concatenate([p.B for p in parts if p.B is not None]),
        linear_before_reset=parts[0].linear_before_reset,
    )


@dataclass(frozen=True)
class CellActivation:
    """One activation slot of an ONNX recurrent op: canonical name and explicit alpha/beta.

    FACTS.md: always write alpha/beta, since onnxruntime's defaults inside the recurrent ops
    differ from the standalone operators'.
    """

    name: str
    alpha: float = 0.0
    beta: float = 0.0


# Which activations take alpha / beta inside the recurrent ops (ONNX spec activation table).
TAKES_ALPHA = frozenset({"Affine", "LeakyRelu", "ThresholdedRelu", "ScaledTanh", "HardSigmoid", "Elu"})
TAKES_BETA = frozenset({"Affine", "ScaledTanh", "HardSigmoid"})


def activation_attrs(slots: list[CellActivation]) -> dict[str, Any]:
    """``activations``, ``activation_alpha``, ``activation_beta`` for a recurrent node.

    The alpha/beta lists are consumed in slot order *only by the activations that take the
    parameter* (how onnxruntime 1.32 reads them, measured): ``[Sigmoid, LeakyRelu(0.2)]`` is
    written ``activation_alpha=[0.2]``. Writing one value per slot would hand LeakyRelu the
    Sigmoid's placeholder. An empty list is omitted (no activation takes that parameter).
    """
    attrs: dict[str, Any] = {"activations": [s.name for s in slots]}
    alpha = [float(s.alpha) for s in slots if s.name in TAKES_ALPHA]
    beta = [float(s.beta) for s in slots if s.name in TAKES_BETA]
    if alpha:
        attrs["activation_alpha"] = alpha
    if beta:
        attrs["activation_beta"] = beta
    return attrs
