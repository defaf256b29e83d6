"""Activations: as separate ONNX ops (after Dense, Conv…) and as slots inside recurrent ops.

An activation is named by a plain kind plus parameters, e.g. ``("leaky_relu", {"alpha": 0.2})``.
Both framework captures translate their own activation objects to these kinds.

Equations emitted (each exact, not approximated):

- ``gelu``: ``0.5·x·(1 + erf(x/√2))``; with ``approximate``: ``0.5·x·(1 + tanh(√(2/π)(x + 0.044715x³)))``
- ``silu``: ``x·σ(x)``; ``hard_silu``: ``x·hardσ(x)`` with hardσ = ``clip(x/6 + 1/2, 0, 1)``
- ``mish``: ``x·tanh(softplus(x))``; ``log_sigmoid``: ``−softplus(−x)``
- ``selu``: ``γ·elu(x, α)``, constants passed explicitly
- ``relu6``: ``clip(x, 0, 6)``; ``hard_tanh``: ``clip(x, lo, hi)``
"""

from __future__ import annotations

import math
from typing import Any

from seqgate.errors import Refusal
from seqgate.export.core.builder import GraphBuilder
from seqgate.export.core.recurrent import CellActivation

Params = dict[str, Any]

# In-cell: the activations onnxruntime accepts inside RNN/GRU/LSTM (FACTS.md).
_CELL: dict[str, Any] = {
    "tanh": lambda p: CellActivation("Tanh"),
    "sigmoid": lambda p: CellActivation("Sigmoid"),
    "relu": lambda p: CellActivation("Relu"),
    "linear": lambda p: CellActivation("Affine", 1.0, 0.0),
    "softsign": lambda p: CellActivation("Softsign"),
    "softplus": lambda p: CellActivation("Softplus"),
    "elu": lambda p: CellActivation("Elu", float(p.get("alpha", 1.0))),
    "leaky_relu": lambda p: CellActivation("LeakyRelu", float(p["alpha"])),
    "hard_sigmoid": lambda p: CellActivation(
        "HardSigmoid", float(p.get("alpha", 1.0 / 6.0)), float(p.get("beta", 0.5))
    ),
}


def cell_activation(kind: str, params: Params | None = None) -> CellActivation:
    """The recurrent-op slot for an activation, or :class:`Refusal` when none is exact."""
    fn = _CELL.get(kind)
    if fn is None:
        raise Refusal(
            f"activation {kind!r} inside the recurrent cell has no exact ONNX recurrent-op "
            f"equivalent",
            "use tanh, sigmoid, relu, linear, hard_sigmoid, elu, softsign, softplus or "
            "leaky_relu inside the cell, or keep the cell default",
        )
    return fn(params or {})


def emit_activation(b: GraphBuilder, kind: str, x: str, params: Params | None = None) -> str:
    """Emit ``kind`` applied to ``x`` as standalone ONNX ops; return the result's name."""
    p = params or {}
    fn = _STANDALONE.get(kind)
    if fn is None:
        raise Refusal(f"activation {kind!r} has no exact ONNX form in seqgate")
    return fn(b, x, p)


def _clip(b: GraphBuilder, x: str, lo: float | None, hi: float | None) -> str:
    ins = [x, b.scalar(lo, "min") if lo is not None else "", b.scalar(hi, "max") if hi is not None else ""]
    return b.op("Clip", ins)


def _gelu(b: GraphBuilder, x: str, p: Params) -> str:
    half = b.scalar(0.5, "half")
    one = b.scalar(1.0, "one")
    if p.get("approximate", False):
        c = b.scalar(math.sqrt(2.0 / math.pi), "sqrt_2_over_pi")
        k = b.scalar(0.044715, "k")
        x3 = b.op("Mul", [b.op("Mul", [x, x]), x])
        inner = b.op("Mul", [c, b.op("Add", [x, b.op("Mul", [k, x3])])])
        t = b.op("Tanh", [inner])
    else:
        t = b.op("Erf", [b.op("Div", [x, b.scalar(math.sqrt(2.0), "sqrt_2")])])
    return b.op("Mul", [b.op("Mul", [half, x]), b.op("Add", [one, t])])


def _hard_sigmoid(b: GraphBuilder, x: str, p: Params) -> str:
    return b.op(
        "HardSigmoid", [x], alpha=float(p.get("alpha", 1.0 / 6.0)), beta=float(p.get("beta", 0.5))
    )


def _relu(b: GraphBuilder, x: str, p: Params) -> str:
    alpha = float(p.get("alpha", 0.0))
    hi = p.get("max_value")
    y = b.op("LeakyRelu", [x], alpha=alpha) if alpha else b.op("Relu", [x])
    return _clip(b, y, None, float(hi)) if hi is not None else y


def _softmax(op: str) -> Any:
    return lambda b, x, p: b.op(op, [x], axis=int(p.get("axis", -1)))


_STANDALONE: dict[str, Any] = {
    "linear": lambda b, x, p: x,
    "relu": _relu,
    "sigmoid": lambda b, x, p: b.op("Sigmoid", [x]),
    "tanh": lambda b, x, p: b.op("Tanh", [x]),
    "softmax": _softmax("Softmax"),
    "log_softmax": _softmax("LogSoftmax"),
    "softplus": lambda b, x, p: b.op("Softplus", [x]),
    "softsign": lambda b, x, p: b.op("Softsign", [x]),
    "elu": lambda b, x, p: b.op("Elu", [x], alpha=float(p.get("alpha", 1.0))),
    "selu": lambda b, x, p: b.op("Selu", [x], alpha=float(p["alpha"]), gamma=float(p["gamma"])),
    "leaky_relu": lambda b, x, p: b.op("LeakyRelu", [x], alpha=float(p["alpha"])),
    "exponential": lambda b, x, p: b.op("Exp", [x]),
    "gelu": _gelu,
    "silu": lambda b, x, p: b.op("Mul", [x, b.op("Sigmoid", [x])]),
    "hard_sigmoid": _hard_sigmoid,
    "hard_silu": lambda b, x, p: b.op("Mul", [x, _hard_sigmoid(b, x, p)]),
    "relu6": lambda b, x, p: _clip(b, x, 0.0, 6.0),
    "hard_tanh": lambda b, x, p: _clip(b, x, float(p.get("min", -1.0)), float(p.get("max", 1.0))),
    "mish": lambda b, x, p: b.op("Mul", [x, b.op("Tanh", [b.op("Softplus", [x])])]),
    "log_sigmoid": lambda b, x, p: b.op("Neg", [b.op("Softplus", [b.op("Neg", [x])])]),
}

STANDALONE_KINDS = frozenset(_STANDALONE)
CELL_KINDS = frozenset(_CELL)
