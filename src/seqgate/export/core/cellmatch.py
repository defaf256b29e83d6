"""Prove, structurally, that a hand-written recurrent step IS a native ONNX LSTM, GRU or RNN.

Input: a step graph (an ONNX ``GraphProto`` whose inputs are ``[state_0 … state_{k−1}, x]`` and
whose first k outputs are the new states, as a ``Scan`` body), and nothing numeric: no sample
is ever run. The graph is read into a small algebra (:mod:`cellalgebra`): every value is a
*sum* ``Σ_s s·M_s + Σ_e p_e ⊙ e + b + Σ extra`` of matmuls of sources (x, a state, a product),
elementwise peepholes, a bias, and non-linear terms (activations, products, ``1 − v``). Then
the outputs are matched against the published equations, term by term:

- **LSTM** (Hochreiter & Schmidhuber 1997 with the forget gate; ONNX LSTM): two states h, c;
  ``c' = f ⊙ c + i ⊙ g`` and ``h' = o ⊙ act_h(c')``; i, f, o share one activation, each gate's
  pre-activation is ``x·W + h·R + b`` (matmuls of x and h only).
- **Peephole LSTM** (Gers & Schmidhuber 2000): as above plus ``p_i ⊙ c`` in i and ``p_f ⊙ c``
  in f (the *previous* c) and ``p_o ⊙ c'`` in o (the *new* c) → ONNX ``P = [p_i, p_o, p_f]``.
  A peephole on any other gate, or on the wrong c, is not a match.
- **GRU** (Cho et al. 2014): one state h; ``h' = (1 − z) ⊙ n + z ⊙ h``; n's recurrent part
  either ``(r ⊙ h)·R_h`` (``linear_before_reset = 0``) or ``r ⊙ (h·R_h + b_h)`` (= 1); z and
  r share one activation.
- **Elman RNN**: one state h; ``h' = act(x·W + h·R + b)`` (no activation = ONNX Affine(1, 0)).

Anything else — another op, an extra term, a gate computed from something other than x and h,
tanh where the gates' activation differs — gives ``(None, reason)``; the caller then exports
the exact step as a ``Scan`` (never a native node). Matrices of the same source that the graph
adds (``x·A + x·B``) are summed: an algebraic identity of the graph's own weights.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from seqgate.export.core.cellalgebra import Act, Algebra, Mismatch, Prod, Sum
from seqgate.export.core.recurrent import CellActivation, Packed

Array = np.ndarray[Any, Any]


@dataclass(frozen=True)
class NativeCell:
    """A proven match: the ONNX op, its weights (D = 1) and which step state is h (and c)."""

    kind: str  # "lstm" | "gru" | "rnn"
    hidden: int
    packed: Packed
    activations: list[CellActivation]
    h_state: int
    c_state: int | None = None

    @property
    def form(self) -> str:
        if self.kind == "lstm":
            return "peephole LSTM" if self.packed.P is not None else "LSTM"
        if self.kind == "gru":
            return f"GRU (linear_before_reset={self.packed.linear_before_reset})"
        return "Elman RNN"


def match_step(graph: Any, n_states: int) -> tuple[NativeCell | None, str]:
    """``(NativeCell, "")`` when the step graph is one of the module's forms, else ``(None, why)``."""
    try:
        alg = Algebra(graph)
        names = [i.name for i in graph.input]
        if len(names) != n_states + 1:
            raise Mismatch(f"the step has {len(names)} inputs, expected {n_states} states and x")
        states, x = names[:n_states], names[n_states]
        outs = [alg.value(o.name) for o in graph.output[:n_states]]
        if n_states == 2:
            return _lstm(alg, x, states, outs), ""
        if n_states == 1:
            return _one_state(alg, x, states[0], outs[0]), ""
        raise Mismatch(f"{n_states} states (LSTM has 2, GRU and RNN 1)")
    except Mismatch as e:
        return None, str(e)


# ----- helpers ---------------------------------------------------------------------------------
def _gate(alg: Algebra, name: str, what: str) -> tuple[CellActivation, Sum]:
    v = alg.value(name)
    if not isinstance(v, Act):
        raise Mismatch(f"{what} is not an activation of a linear pre-activation")
    return v.slot, alg.sum_of(v.arg)


def _affine(s: Sum, what: str, x: str, h: str, hidden: int, peep: tuple[str, ...] = ()) -> None:
    """``s`` must be ``x·W + h·R [+ p ⊙ peep] + b`` with width ``hidden``: nothing else."""
    if s.extra:
        raise Mismatch(f"{what} has an extra non-linear term")
    bad = [k for k in s.terms if k not in (x, h)]
    if bad:
        raise Mismatch(f"{what} multiplies a computed value by a weight matrix ({bad[0]})")
    wrong = [k for k in s.diag if k not in peep]
    if wrong:
        raise Mismatch(f"{what} has an elementwise weight on {wrong[0]}"
                       + (" (a peephole reading the wrong cell state)" if peep else ""))
    if s.width != hidden:
        raise Mismatch(f"{what} is {s.width} wide, the state {hidden}")


def _block(s: Sum, src: str, rows: int, hidden: int) -> Array:
    """``M_src`` transposed to ONNX ``[hidden, rows]`` (zeros when the source is absent)."""
    m = s.terms.get(src)
    return np.zeros((hidden, rows)) if m is None else np.asarray(m, np.float64).T


def _bias(s: Sum, hidden: int) -> Array:
    return np.zeros(hidden) if s.bias is None else np.broadcast_to(s.bias, (hidden,)).astype(np.float64)


def _pack(kind: str, gates: list[Sum], x: str, h: str, rows: tuple[int, int], rec_bias: list[Array],
          lbr: int = 0, peep: Array | None = None) -> Packed:
    hidden = rows[1]
    w = np.concatenate([_block(g, x, rows[0], hidden) for g in gates])
    r = np.concatenate([_block(g, h, hidden, hidden) for g in gates])
    biases = [_bias(g, hidden) for g in gates]
    has_b = any(g.bias is not None for g in gates) or any(np.any(rb) for rb in rec_bias)
    b = np.concatenate([*biases, *rec_bias]) if has_b else None
    f32 = np.float32
    return Packed(W=w.astype(f32)[None], R=r.astype(f32)[None],
                  B=None if b is None else b.astype(f32)[None], linear_before_reset=lbr,
                  P=None if peep is None else peep.astype(f32)[None])


def _same_slot(slots: list[CellActivation], what: str) -> None:
    if len(set(slots)) != 1:
        raise Mismatch(f"{what} use different activations ({', '.join(s.name for s in slots)})")


def _pure_sum(v: Any) -> bool:
    """A sum of exactly two non-linear terms and nothing else."""
    return isinstance(v, Sum) and not v.terms and not v.diag and v.bias is None and len(v.extra) == 2


# ----- LSTM ------------------------------------------------------------------------------------
def _lstm(alg: Algebra, x: str, states: list[str], outs: list[Any]) -> NativeCell:
    reasons = []
    for hi, ci in ((0, 1), (1, 0)):
        try:
            return _lstm_as(alg, x, states, outs, hi, ci)
        except Mismatch as e:
            reasons.append(str(e))
    raise Mismatch(f"not an LSTM: {reasons[0]}")


def _lstm_as(alg: Algebra, x: str, states: list[str], outs: list[Any], hi: int, ci: int) -> NativeCell:
    h, c = states[hi], states[ci]
    c_new, h_new = outs[ci], outs[hi]
    if not _pure_sum(c_new):
        raise Mismatch("the new cell state is not f ⊙ c + i ⊙ g")
    prods = [alg.value(e) for e in c_new.extra]
    if not all(isinstance(p, Prod) for p in prods):
        raise Mismatch("the new cell state is not a sum of two products")
    forget, feed = _weighted_state(alg, prods, c, "cell state", "forget gate")
    if len(feed.args) != 2:
        raise Mismatch("the cell input is not a product of two gates")
    if not isinstance(h_new, Prod) or len(h_new.args) != 2:
        raise Mismatch("the new hidden state is not o ⊙ act(c)")
    c_name = alg.name_of_output(ci)
    outs_act = [a for a in h_new.args if isinstance(alg.value(a), Act) and alg.value(a).arg == c_name]
    if len(outs_act) != 1:
        raise Mismatch("the new hidden state does not read the new cell state through one activation")
    o_name = _other(alg, h_new, outs_act[0], "the new hidden state is not o ⊙ act(c)")
    slot_h = alg.value(outs_act[0]).slot
    return _lstm_gates(alg, x, h, c, c_name, forget, feed.args, o_name, slot_h, (hi, ci))


def _lstm_gates(alg: Algebra, x: str, h: str, c: str, c_new: str, forget: str, feed: tuple[str, ...],
                o_name: str, slot_h: CellActivation, idx: tuple[int, int]) -> NativeCell:
    sf, f = _gate(alg, forget, "the forget gate")
    so, o = _gate(alg, o_name, "the output gate")
    hidden = f.width or 0
    if not hidden:
        raise Mismatch("the forget gate's width is not known")
    a, b_ = (_gate(alg, n, "a cell-input factor") for n in feed)
    # i shares the output gate's activation; g is the other factor (a peephole marks i when both match)
    order = [(a, b_), (b_, a)]
    order.sort(key=lambda p: (p[0][0] != so, not p[0][1].diag))
    (si, i), (sg, g) = order[0]
    _same_slot([si, sf, so], "the input, forget and output gates")
    rows = _input_rows(alg, x, [i, f, o, g])
    _affine(i, "the input gate", x, h, hidden, (c,))
    _affine(f, "the forget gate", x, h, hidden, (c,))
    _affine(o, "the output gate", x, h, hidden, (c_new,))
    _affine(g, "the cell candidate", x, h, hidden)
    peeps = [i.diag.get(c), o.diag.get(c_new), f.diag.get(c)]
    peep = None
    if any(p is not None for p in peeps):
        peep = np.concatenate([np.zeros(hidden) if p is None else np.broadcast_to(p, (hidden,)) for p in peeps])
    packed = _pack("lstm", [i, o, f, g], x, h, (rows, hidden), [np.zeros(4 * hidden)], peep=peep)
    return NativeCell("lstm", hidden, packed, [sf, sg, slot_h], h_state=idx[0], c_state=idx[1])


def _input_rows(alg: Algebra, x: str, gates: list[Sum]) -> int:
    for g in gates:
        if x in g.terms:
            return int(np.asarray(g.terms[x]).shape[0])
    return alg.width_of_input(x)


# ----- GRU and Elman ---------------------------------------------------------------------------
def _one_state(alg: Algebra, x: str, h: str, out: Any) -> NativeCell:
    if _pure_sum(out):
        return _gru(alg, x, h, out)
    if isinstance(out, Act | Sum):
        return _elman(alg, x, h, out)
    raise Mismatch("the new state is neither act(x·W + h·R + b) nor (1 − z) ⊙ n + z ⊙ h")


def _elman(alg: Algebra, x: str, h: str, out: Any) -> NativeCell:
    if isinstance(out, Act):
        slot, pre = out.slot, alg.sum_of(out.arg)
    else:
        slot, pre = CellActivation("Affine", 1.0, 0.0), out
    hidden = pre.width or 0
    _affine(pre, "the new state's pre-activation", x, h, hidden)
    rows = _input_rows(alg, x, [pre])
    return NativeCell("rnn", hidden, _pack("rnn", [pre], x, h, (rows, hidden), [np.zeros(hidden)]), [slot], 0)


def _other(alg: Algebra, prod: Prod, name: str, what: str) -> str:
    """The factor of a two-factor product that is not ``name``."""
    rest = [a for a in prod.args if a != name]
    if len(prod.args) != 2 or len(rest) != 1:
        raise Mismatch(what)
    return rest[0]


def _weighted_state(alg: Algebra, prods: list[Any], state: str, what: str, gate: str) -> tuple[str, Any]:
    """Of two products, the one holding the previous ``state`` and its other factor (the gate),
    and the other product: ``gate ⊙ state + other``."""
    keep = [p for p in prods if state in p.args]
    if len(keep) != 1:
        raise Mismatch(f"the previous {what} does not enter the new one through exactly one product")
    weight = _other(alg, keep[0], state, f"the previous {what} is not weighted by one {gate}")
    (other,) = [p for p in prods if p is not keep[0]]
    return weight, other


def _gru(alg: Algebra, x: str, h: str, out: Sum) -> NativeCell:
    prods = [alg.value(e) for e in out.extra]
    if not all(isinstance(p, Prod) and len(p.args) == 2 for p in prods):
        raise Mismatch("the new state is not (1 − z) ⊙ n + z ⊙ h")
    z_name, mix = _weighted_state(alg, prods, h, "state", "gate z")
    one_minus = [a for a in mix.args if alg.is_one_minus(a, z_name)]
    if len(one_minus) != 1:
        raise Mismatch("the candidate is not weighted by 1 − z (z must weight the previous state)")
    n_name = _other(alg, mix, one_minus[0], "the candidate is not weighted by 1 − z")
    sz, z = _gate(alg, z_name, "the update gate")
    sn, n = _gate(alg, n_name, "the candidate")
    hidden = z.width or 0
    r_name, lbr, rh, rbh = _reset_part(alg, x, h, n, hidden)
    sr, r = _gate(alg, r_name, "the reset gate")
    _same_slot([sz, sr], "the update and reset gates")
    _affine(z, "the update gate", x, h, hidden)
    _affine(r, "the reset gate", x, h, hidden)
    terms = {k: v for k, v in ((x, n.terms.get(x)), (h, rh)) if v is not None}
    cand = Sum(terms, {}, n.bias, (), hidden)
    rows = _input_rows(alg, x, [z, r, cand])
    packed = _pack("gru", [z, r, cand], x, h, (rows, hidden), [np.zeros(2 * hidden), rbh], lbr=lbr)
    return NativeCell("gru", hidden, packed, [sz, sn], h_state=0)


def _reset_part(alg: Algebra, x: str, h: str, n: Sum, hidden: int) -> tuple[str, int, Array | None, Array]:
    """(reset gate, linear_before_reset, R_h [H, H] as (in, out), R_bh) read from the candidate."""
    if n.diag or n.width != hidden:
        raise Mismatch("the candidate has an elementwise weight or another width")
    if n.extra:  # x·W_h + b + r ⊙ (h·R_h + b_h)
        p = alg.value(n.extra[0])
        lin = [a for a in getattr(p, "args", ()) if isinstance(alg.value(a), Sum)]
        if len(n.extra) != 1 or any(k != x for k in n.terms) or not isinstance(p, Prod) or len(lin) != 1:
            raise Mismatch("the candidate's recurrent part is not r ⊙ (h·R_h + b_h)")
        r_name = _other(alg, p, lin[0], "the candidate's recurrent part is not r ⊙ (h·R_h + b_h)")
        s = alg.sum_of(lin[0])
        _affine(s, "the candidate's recurrent part", "", h, hidden)
        return r_name, 1, s.terms.get(h), _bias(s, hidden)
    recs = [k for k in n.terms if k != x]
    p = alg.value(recs[0]) if len(recs) == 1 else None
    if not isinstance(p, Prod) or h not in p.args:
        raise Mismatch("the candidate's recurrent matmul does not read r ⊙ h")
    r_name = _other(alg, p, h, "the candidate's recurrent matmul does not read r ⊙ h")
    return r_name, 0, n.terms[recs[0]], np.zeros(hidden)
