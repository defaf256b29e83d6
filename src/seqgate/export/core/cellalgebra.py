"""A small symbolic algebra of a recurrent step graph, read op by op (used by ``cellmatch``).

Every ONNX value of the step becomes one of:

- ``Const``: an initializer or ``Constant`` (weights, biases, the 1 of ``1 − z``);
- ``Sum``: ``Σ_s s·M_s + Σ_e p_e ⊙ e + b + Σ extra`` — ``terms`` maps a source value name to
  its weight matrix ``M_s [in, width]`` (MatMul/Gemm with a constant right side), ``diag`` maps a
  value name to an elementwise weight ``p_e`` (Mul by a constant vector: a peephole), ``bias``
  is a constant and ``extra`` lists non-linear values added in (products, activations);
- ``Act``: a recurrent-op activation (Sigmoid, Tanh, Relu, HardSigmoid α β, …) of one value;
- ``Prod``: an elementwise product of non-constant values; ``OneMinus``: ``1 − v``;
- a graph input (``Source``), or ``Opaque(reason)`` for anything else (another op, a matmul of
  a computed sum, a split across a non-linear term). Reading an opaque value raises
  :class:`Mismatch` with the reason, so only ops the step's outputs depend on matter.

Rules are the algebraic identities of the ops (ONNX spec): ``Add`` merges sums (matrices of
the same source add up), ``Split``/``Slice`` on the last axis slice every column block,
``Identity`` aliases. Nothing is evaluated on numbers.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from onnx import helper, numpy_helper

from seqgate.export.core.recurrent import CellActivation

Array = np.ndarray[Any, Any]


class Mismatch(Exception):
    """The step is not the form being matched; the message says what differs."""


@dataclass(frozen=True)
class Const:
    value: Array


@dataclass(frozen=True)
class Source:
    name: str


@dataclass(frozen=True)
class Opaque:
    reason: str


@dataclass(frozen=True)
class Act:
    slot: CellActivation
    arg: str


@dataclass(frozen=True)
class Prod:
    args: tuple[str, ...]


@dataclass(frozen=True)
class OneMinus:
    arg: str


@dataclass(frozen=True)
class Sum:
    terms: dict[str, Array] = field(default_factory=dict)
    diag: dict[str, Array] = field(default_factory=dict)
    bias: Array | None = None
    extra: tuple[str, ...] = ()
    width: int | None = None


# ONNX standalone defaults (spec) for activations that take parameters.
_PLAIN_ACTS = ("Sigmoid", "Tanh", "Relu", "Softsign", "Softplus")
_PARAM_ACTS = {"HardSigmoid": (0.2, 0.5), "LeakyRelu": (0.01, 0.0), "Elu": (1.0, 0.0)}


def _merge_width(*widths: int | None) -> int | None:
    known = {w for w in widths if w is not None and w != 1}
    if len(known) > 1:
        raise Mismatch(f"terms of different widths {sorted(known)} are added")
    return known.pop() if known else None


def _add(a: Sum, b: Sum, sign: float = 1.0) -> Sum:
    if sign < 0 and b.extra:
        raise Mismatch("a non-linear term is subtracted")
    terms = dict(a.terms)
    for k, m in b.terms.items():
        terms[k] = terms[k] + sign * m if k in terms else sign * m
    diag = dict(a.diag)
    for k, p in b.diag.items():
        diag[k] = diag[k] + sign * p if k in diag else sign * p
    bias = a.bias if b.bias is None else (sign * b.bias if a.bias is None else a.bias + sign * b.bias)
    return Sum(terms, diag, bias, a.extra + b.extra, _merge_width(a.width, b.width))


def _columns(s: Sum, lo: int, hi: int) -> Sum:
    if s.extra:
        raise Mismatch("a split cuts through a non-linear term")
    if s.width is None:
        raise Mismatch("a split of a value of unknown width")

    def cut(v: Array | None) -> Array | None:
        if v is None:
            return None
        return v if v.size == 1 else v[..., lo:hi]

    return Sum({k: m[:, lo:hi] for k, m in s.terms.items()}, {k: cut(p) for k, p in s.diag.items()},  # type: ignore[misc]
               cut(s.bias), (), hi - lo)


class Algebra:
    """The abstract value of every name in a step graph (module docstring)."""

    def __init__(self, graph: Any) -> None:
        self._vals: dict[str, Any] = {}
        self._alias: dict[str, str] = {}
        self._inputs = {i.name: i for i in graph.input}
        self._outputs = [o.name for o in graph.output]
        for init in graph.initializer:
            self._vals[init.name] = Const(numpy_helper.to_array(init).astype(np.float64))
        for i in graph.input:
            self._vals[i.name] = Source(i.name)
        for node in graph.node:
            self._node(node)

    # ----- reading ---------------------------------------------------------------------------
    def canon(self, name: str) -> str:
        while name in self._alias:
            name = self._alias[name]
        return name

    def value(self, name: str) -> Any:
        v = self._vals.get(self.canon(name))
        if v is None:
            raise Mismatch(f"value {name!r} is not computed in the step")
        if isinstance(v, Opaque):
            raise Mismatch(v.reason)
        return v

    def name_of_output(self, index: int) -> str:
        return self.canon(self._outputs[index])

    def sum_of(self, name: str) -> Sum:
        """``name`` as a sum (a non-linear value is a sum with one extra term)."""
        v = self.value(name)
        if isinstance(v, Sum):
            return v
        if isinstance(v, Const):
            return Sum(bias=v.value, width=int(v.value.shape[-1]) if v.value.ndim else None)
        return Sum(extra=(self.canon(name),))

    def is_one_minus(self, name: str, of: str) -> bool:
        v = self.value(name)
        return isinstance(v, OneMinus) and v.arg == self.canon(of)

    def width_of_input(self, name: str) -> int:
        dims = self._inputs[name].type.tensor_type.shape.dim
        if not dims or not dims[-1].HasField("dim_value"):
            raise Mismatch(f"the width of {name} is not fixed")
        return int(dims[-1].dim_value)

    # ----- ops -------------------------------------------------------------------------------
    def _node(self, node: Any) -> None:
        ins = [self.canon(i) for i in node.input]
        attrs = {a.name: helper.get_attribute_value(a) for a in node.attribute}
        op = node.op_type
        try:
            if op == "Identity":
                self._alias[node.output[0]] = ins[0]
                return
            if op in ("Split", "Slice"):
                for name, v in zip(node.output, self._split(op, ins, attrs, len(node.output)), strict=True):
                    self._vals[name] = v
                return
            self._vals[node.output[0]] = self._single(op, ins, attrs)
        except Mismatch as e:
            for o in node.output:
                self._vals[o] = Opaque(str(e))

    def _single(self, op: str, ins: list[str], attrs: dict[str, Any]) -> Any:
        if op == "Constant":
            return Const(numpy_helper.to_array(attrs["value"]).astype(np.float64))
        if op in _PLAIN_ACTS:
            return Act(CellActivation(op), ins[0])
        if op in _PARAM_ACTS:
            da, db = _PARAM_ACTS[op]
            beta = float(attrs.get("beta", db)) if op == "HardSigmoid" else 0.0
            return Act(CellActivation(op, float(attrs.get("alpha", da)), beta), ins[0])
        if op == "MatMul":
            return self._matmul(ins[0], self._const(ins[1], "a matmul's weight"))
        if op == "Gemm":
            return self._gemm(ins, attrs)
        if op == "Add":
            return _add(self.sum_of(ins[0]), self.sum_of(ins[1]))
        if op == "Sub":
            return self._sub(ins[0], ins[1])
        if op == "Mul":
            return self._mul(ins[0], ins[1])
        raise Mismatch(f"the step uses the op {op}")

    def _const(self, name: str, what: str) -> Array:
        v = self.value(name)
        if not isinstance(v, Const):
            raise Mismatch(f"{what} is computed, not a constant")
        return v.value

    def _matmul(self, a: str, w: Array) -> Sum:
        if w.ndim != 2:
            raise Mismatch(f"a matmul by a rank-{w.ndim} constant")
        if isinstance(self.value(a), Const | Sum):
            raise Mismatch("a matmul of a constant or of a computed sum")
        return Sum(terms={a: w}, width=int(w.shape[1]))

    def _gemm(self, ins: list[str], attrs: dict[str, Any]) -> Sum:
        if attrs.get("transA", 0) or attrs.get("alpha", 1.0) != 1.0 or attrs.get("beta", 1.0) != 1.0:
            raise Mismatch("a Gemm with transA, alpha or beta")
        w = self._const(ins[1], "a Gemm's weight")
        s = self._matmul(ins[0], w.T if attrs.get("transB", 0) else w)
        return s if len(ins) < 3 or not ins[2] else _add(s, self.sum_of(ins[2]))

    def _sub(self, a: str, b: str) -> Any:
        va = self.value(a)
        if isinstance(va, Const) and np.all(va.value == 1.0) and va.value.size == 1:
            return OneMinus(b)
        return _add(self.sum_of(a), self.sum_of(b), -1.0)

    def _mul(self, a: str, b: str) -> Any:
        va, vb = self.value(a), self.value(b)
        if isinstance(vb, Const):
            a, b, va, vb = b, a, vb, va
        if isinstance(va, Const):
            if isinstance(vb, Const):
                raise Mismatch("a product of two constants")
            p = va.value.reshape(-1) if va.value.ndim <= 1 or va.value.shape[0] == 1 else None
            if p is None:
                raise Mismatch("an elementwise weight that is not a vector")
            return Sum(diag={b: p}, width=int(p.size) if p.size > 1 else None)
        return Prod((a, b))

    def _split(self, op: str, ins: list[str], attrs: dict[str, Any], n_out: int) -> list[Any]:
        s = self.sum_of(ins[0])
        rank = 2  # step values are [batch, width], as in the recurrent ops
        if op == "Slice":
            starts, ends = (int(self._const(i, "a slice bound").reshape(-1)[0]) for i in ins[1:3])
            axes = int(self._const(ins[3], "slice axes").reshape(-1)[0]) if len(ins) > 3 and ins[3] else 0
            steps = int(self._const(ins[4], "slice steps").reshape(-1)[0]) if len(ins) > 4 and ins[4] else 1
            self._last_axis(axes, rank)
            if steps != 1 or s.width is None:
                raise Mismatch("a strided slice")
            lo, hi = (max(0, min(v if v >= 0 else s.width + v, s.width)) for v in (starts, ends))
            return [_columns(s, lo, hi)]
        self._last_axis(int(attrs.get("axis", 0)), rank)
        if s.width is None:
            raise Mismatch("a split of a value of unknown width")
        if len(ins) > 1 and ins[1]:
            sizes = [int(v) for v in self._const(ins[1], "split sizes").reshape(-1)]
        elif "split" in attrs:
            sizes = [int(v) for v in attrs["split"]]
        else:
            sizes = [s.width // n_out] * n_out
        bounds = np.cumsum([0, *sizes])
        return [_columns(s, int(lo), int(hi)) for lo, hi in itertools.pairwise(bounds)]

    @staticmethod
    def _last_axis(axis: int, rank: int) -> None:
        if axis not in (rank - 1, -1):
            raise Mismatch(f"a split or slice on axis {axis}, not the feature axis")
