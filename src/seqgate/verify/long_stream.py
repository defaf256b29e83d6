"""Long-stream stability: a stream many times longer than the recorded windows, run through the
streaming file and through the source framework, compared at every step.

Inputs (``seqgate.verify.long_inputs``): per recording one set of ``rows`` streams of
``factor × T`` steps made of consecutive recorded windows, and one synthetic set.

Runs, per set, in calls of ``T`` steps (one window's worth: the length the model was trained
on, which a source with a fixed time dim also accepts):

- ONNX Runtime: the streaming file, each call's state outputs fed back as the next call's state
  inputs (``seqgate.streaming`` pairs), the first call without states;
- the source framework (the reference):
  - a Keras model with ``stateful=True`` layers: states zeroed, then called chunk by chunk with
    the same chunks; Keras carries the state from call to call, as it does in deployment;
  - any other source: one call on the whole stream. The streaming export proved the graph
    causal, so by the recurrence's definition (``h_t = f(x_t, h_{t−1})`` from ``h_{−1} = 0``,
    each output step a function of the states and inputs up to t) step t of the whole-stream
    run *is* what carrying the state chunk by chunk must give: the whole run is the reference.

Compared, each tensor with its own tolerance ``|Δ| ≤ atol + rtol·|source|`` (``[[tolerance]]``
overrides apply; a state output takes its layer's ``hidden_final``/``cell_final`` probe's):

- every per-step output at every step, every layer's hidden state at every step (probe
  ``hidden_sequence``);
- at the end of every call: each state output (``h_out`` against the source's state after that
  step, ``c_out`` against its ``cell_final``), the ``hidden_final``/``cell_final`` probes and the
  outputs without a time axis — where the source gives them at that step (every call for a
  stateful source; the last call, and ``h`` at every call, for a whole-stream run).

Recorded per set: the per-step error growth curve, max |Δ| over rows and tensors at each step,
separately for outputs and states, binned (max per bin) to at most ``MAX_POINTS`` points;
``growth`` = max |Δ| over the last window / over the first; per tensor its max |Δ| and first
step outside tolerance. Verdict: any step of any tensor outside tolerance fails the check; the
failure names the tensor and the first failing step, and says when that step opens a call after
the first while everything before it was within tolerance (the state carried into the call is
wrong).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from seqgate.onnxfile.probes import read_probe_map
from seqgate.settings import Tolerances
from seqgate.verify.long_inputs import LongStream

Array = np.ndarray[Any, Any]
Feeds = dict[str, Array]
LONG_ROWS = 2  # streams per set (a fixed-batch model streams exactly its batch)
MAX_POINTS = 200  # points of a growth curve in the JSON report


@dataclass
class _Tensor:
    """One compared tensor along one set's stream."""

    name: str
    kind: str  # "output" | "state"
    atol: float
    rtol: float
    order: int
    max_abs: float = 0.0
    first_bad: int | None = None
    compared: int = 0  # steps compared

    def to_json(self) -> dict[str, Any]:
        return {"name": self.name, "kind": self.kind, "atol": self.atol, "rtol": self.rtol,
                "max_abs": self.max_abs, "first_bad_step": self.first_bad, "steps_compared": self.compared,
                "passed": self.first_bad is None}


@dataclass
class _SetResult:
    stream: LongStream
    calls: int = 0
    source_run: str = ""
    tensors: dict[str, _Tensor] = field(default_factory=dict)
    outputs_curve: Array = field(default_factory=lambda: np.zeros(0))
    states_curve: Array = field(default_factory=lambda: np.zeros(0))


def per_step(got: Array, ref: Array, axis: int, atol: float, rtol: float) -> tuple[Array, Array]:
    """(max |Δ| per step, every element within tolerance per step) along ``axis``; a shape
    mismatch or a NaN counts as an infinite difference."""
    g, r = np.asarray(got, np.float64), np.asarray(ref, np.float64)
    n = r.shape[axis] if r.ndim > axis else 1
    if g.shape != r.shape:
        return np.full(n, np.inf), np.zeros(n, bool)
    d = np.abs(g - r)
    d = np.where(np.isnan(d), np.inf, d)
    ok = d <= atol + rtol * np.abs(r)
    d, ok = (np.moveaxis(a, axis, 0).reshape(n, -1) for a in (d, ok))
    return d.max(axis=1, initial=0.0), ok.all(axis=1)


def binned(curve: Array, points: int = MAX_POINTS) -> tuple[int, list[float | None]]:
    """(steps per bin, max of each bin): at most ``points`` values; NaN marks a step where
    nothing was compared, and a bin of such steps is None."""
    size = max(1, -(-len(curve) // points))
    bins = [curve[i:i + size] for i in range(0, len(curve), size)]
    return size, [None if np.isnan(b).all() else float(np.nanmax(b)) for b in bins]


def _nanmax(x: Array) -> float:
    return 0.0 if np.isnan(x).all() else float(np.nanmax(x))


class LongStreamChecker:
    """Streams each :class:`LongStream` through ``model`` (a streaming ``onnx.ModelProto``) and
    the source runner; see the module docstring."""

    def __init__(self, model: Any, source: Any, tol: Tolerances) -> None:
        from seqgate.export.streaming import read_streaming
        from seqgate.runtimes.onnx import OnnxRunner

        info = read_streaming(model)
        assert info is not None, "not a streaming file"
        self.source, self.tol = source, tol
        self.probes = [p for p in read_probe_map(model) if p.direction == "forward"]
        self.runner = OnnxRunner(model, self.probes)
        self.seq_inputs = {i["name"]: i["time_axis"] for i in info["inputs"]}
        self.timed = {o["name"]: o["time_axis"] for o in info["outputs"]}
        self.states = info["states"]
        # ties at one step name the states first: a wrong output follows from a wrong state
        names = [*(p.name for p in self.probes), *(s["output"] for s in self.states), *self.timed]
        self.order = {n: i for i, n in enumerate(names)}

    def _slice(self, feeds: Feeds, a: int, e: int) -> Feeds:
        return {k: v if self.seq_inputs.get(k) is None else np.take(v, np.arange(a, e), axis=self.seq_inputs[k])
                for k, v in feeds.items()}

    def check(self, stream: LongStream, specs: list[Any]) -> _SetResult:
        from seqgate.verify.recordings import to_model_layout

        feeds = to_model_layout(stream.feeds, specs)
        res = _SetResult(stream, outputs_curve=np.full(stream.steps, np.nan),
                         states_curve=np.full(stream.steps, np.nan))
        carry = bool(getattr(self.source, "stateful", False))
        res.source_run = ("stateful source: states zeroed, then called chunk by chunk" if carry
                          else "one call on the whole stream (causal: equal to carrying the state)")
        whole = None
        if carry:
            self.source.reset_states()
        else:
            whole = self.source.run(feeds)
        states: Feeds = {}
        for k, a in enumerate(range(0, stream.steps, stream.window)):
            e = min(a + stream.window, stream.steps)
            chunk = self._slice(feeds, a, e)
            got = self.runner.run({**chunk, **states})
            ref = self.source.run_carrying(chunk) if carry else self._from_whole(whole, a, e, stream.steps)
            self._compare(res, a, e, got, ref)
            states = {s["input"]: got[s["output"]] for s in self.states}
            res.calls = k + 1
        return res

    def _from_whole(self, whole: Any, a: int, e: int, steps: int) -> dict[str, Array]:
        """The whole-stream run's values for the call over steps ``[a, e)`` (module docstring)."""
        out = {}
        for name, ax in self.timed.items():
            if name in whole and (ax is not None or e == steps):
                out[name] = whole[name] if ax is None else np.take(whole[name], np.arange(a, e), axis=ax)
        for p in self.probes:
            if p.name not in whole:
                continue
            if p.kind == "hidden_sequence":
                out[p.name] = whole[p.name][:, a:e]
            elif e == steps:
                out[p.name] = whole[p.name]
        return out

    def _tensor(self, res: _SetResult, name: str, kind: str, tol_name: str) -> _Tensor:
        if name not in res.tensors:
            atol, rtol = self.tol.for_tensor(tol_name)
            res.tensors[name] = _Tensor(name, kind, atol, rtol, self.order.get(name, len(self.order)))
        return res.tensors[name]

    def _note(self, res: _SetResult, t: _Tensor, a: int, got: Array, ref: Array, axis: int | None) -> None:
        """Compare one tensor over steps ``a…`` (``axis`` None: one value at step ``a``)."""
        if axis is None:
            got, ref, axis = np.asarray(got)[None], np.asarray(ref)[None], 0
        d, ok = per_step(got, ref, axis, t.atol, t.rtol)
        steps = np.arange(a, a + len(d))
        curve = res.outputs_curve if t.kind == "output" else res.states_curve
        np.fmax.at(curve, steps, d)  # fmax: a step not compared yet (NaN) takes d
        t.max_abs = max(t.max_abs, float(d.max(initial=0.0)))
        t.compared += len(d)
        if t.first_bad is None and not ok.all():
            t.first_bad = int(steps[int(np.argmin(ok))])

    def _compare(self, res: _SetResult, a: int, e: int, got: dict[str, Array], ref: dict[str, Array]) -> None:
        for name, ax in self.timed.items():
            if name in ref:
                self._note(res, self._tensor(res, name, "output", name), a if ax is not None else e - 1,
                           got[name], ref[name], ax)
        for p in self.probes:
            if p.name in ref:
                seq = p.kind == "hidden_sequence"
                self._note(res, self._tensor(res, p.name, "state", p.name), a if seq else e - 1,
                           got[p.name], ref[p.name], 1 if seq else None)
        for s in self.states:
            want = self._source_state(s, ref)
            if want is not None:
                kind = "hidden_final" if s["state"] == "h" else "cell_final"
                t = self._tensor(res, s["output"], "state", f"{s['layer']}/forward/{kind}")
                self._note(res, t, e - 1, got[s["output"]], want, None)

    @staticmethod
    def _source_state(s: dict[str, Any], ref: dict[str, Array]) -> Array | None:
        """The source's state of pair ``s`` at the call's last step, ONNX layout ``[1, N, H]``."""
        base = f"{s['layer']}/forward"
        kind = "hidden_final" if s["state"] == "h" else "cell_final"
        if f"{base}/{kind}" in ref:
            return np.moveaxis(ref[f"{base}/{kind}"], 1, 0)
        if s["state"] == "h" and f"{base}/hidden_sequence" in ref:
            return np.moveaxis(ref[f"{base}/hidden_sequence"][:, -1], 1, 0)  # [N, 1, H] → [1, N, H]
        return None


def _first_failure(res: _SetResult, bad: list[_Tensor], pairs: list[dict[str, Any]]) -> dict[str, Any]:
    """The earliest failing tensor of a set, with a diagnosis (module docstring)."""
    t = bad[0]
    step, w, steps = int(t.first_bad or 0), res.stream.window, res.stream.steps
    call = step // w
    text = (f"{res.stream.label}: {t.kind} '{t.name}' leaves tolerance first at step {step} of {steps} "
            f"(call {call + 1}, steps {call * w}..{min(call * w + w, steps) - 1}; max |Δ| along the stream "
            f"{t.max_abs:.3g}, atol {t.atol:g}, rtol {t.rtol:g})")
    pair = next((p for p in pairs if p["output"] == t.name), None)
    if pair is not None:
        text += (f": the state output does not hold layer {pair['layer']}'s {pair['state']} after that step — "
                 f"check which value '{t.name}' is wired to")
    elif step and step % w == 0:
        text += (f": step {step} opens call {call + 1} and every tensor was within tolerance before it, so the "
                 f"state carried into that call is wrong — check that each state output goes back in as its "
                 f"state input ({', '.join(p['output'] + ' → ' + p['input'] for p in pairs)})")
    return {"set": res.stream.label, "tensor": t.name, "kind": t.kind, "step": step, "message": text}


def _set_json(res: _SetResult, pairs: list[dict[str, Any]]) -> dict[str, Any]:
    tensors = sorted(res.tensors.values(), key=lambda t: t.order)
    bad = sorted((t for t in tensors if t.first_bad is not None), key=lambda t: (t.first_bad or 0, t.order))
    size, outputs = binned(res.outputs_curve)
    _, states = binned(res.states_curve)
    both = np.fmax(res.outputs_curve, res.states_curve)
    w = res.stream.window
    first_w, last_w = _nanmax(both[:w]), _nanmax(both[-w:])
    first = _first_failure(res, bad, pairs) if bad else None
    others = [f"{res.stream.label}: {t.kind} '{t.name}' first outside tolerance at step {t.first_bad} "
              f"(max |Δ| {t.max_abs:.3g})" for t in bad[1:10]]
    return {**res.stream.to_json(), "passed": not bad, "calls": res.calls, "chunk": w,
            "source_run": res.source_run, "max_abs_outputs": _nanmax(res.outputs_curve),
            "max_abs_states": _nanmax(res.states_curve),
            "growth": last_w / first_w if first_w > 0 else None, "step_bin": size,
            "outputs_max_abs": outputs, "states_max_abs": states,
            "tensors": [t.to_json() for t in tensors], "first_failure": first,
            "failures": ([first["message"]] if first else []) + others}


def long_stream_check(model: Any, recs: list[Any], specs: list[Any], source: Any, tol: Tolerances, factor: int,
                      seed: int, batch_size: int) -> dict[str, Any] | None:
    """The ``long_stream`` section of a verify report for a streaming ``model``; None when
    ``factor`` is 0 (the check is off). ``recs`` are verify's window sets, ``source`` the source
    framework's runner (``run``; ``stateful``/``reset_states``/``run_carrying`` for Keras)."""
    from seqgate.runtimes.batches import fixed_batch
    from seqgate.verify.long_inputs import long_streams

    if not factor:
        return None
    rows = fixed_batch(model, outputs=False) or LONG_ROWS
    checker = LongStreamChecker(model, source, tol)
    sets = [_set_json(checker.check(s, specs), checker.states)
            for s in long_streams(recs, specs, factor, rows, seed, batch_size)]
    firsts = [s["first_failure"] for s in sets if s["first_failure"]]
    return {"passed": not firsts, "factor": factor, "rows": rows, "atol": tol.atol, "rtol": tol.rtol,
            "states": [s["output"] for s in checker.states], "sets": sets,
            "first_failure": firsts[0] if firsts else None}
