"""Streaming equivalence: a streaming file fed chunk by chunk computes what the whole window computes.

For each batch of windows ``x`` (``T`` steps) and each chunk size ``c`` (1, 7 and the user's):

1. *whole*: the file runs ``x`` once with every state input left out (zeros);
2. *stream*: it runs ``x[:, 0:c]``, ``x[:, c:2c]``… feeding each ``*_out`` back as the matching
   ``*_in`` (``seqgate.streaming`` metadata), the first call with the states left out;
3. compared after every chunk ending at step ``e``, with ``|Δ| ≤ atol + rtol·|ref|``:
   - per-step outputs of the chunk against the whole run's steps ``[e−c, e)``;
   - every state output against the *probe* of its layer in a run of the prefix ``x[:, :e]``
     (``hidden_final`` / ``cell_final``: the node's own output slot, independent of how the
     state outputs are wired), and outputs without a time axis against that prefix run;
   - against the source framework (the reference), when a source run is given: per-step
     outputs, ``h`` against the source's ``hidden_sequence`` at step ``e−1``, and at the last
     chunk the final ``h``/``c`` and the outputs without a time axis.

A state that leaves tolerance is named with a diagnosis: ``c`` and ``h`` swapped (each matches
the other's reference), wired to another layer (it matches that layer's reference), or not fed
forward (right after the first chunk, wrong later).

Cost: prefix runs make a stream of chunk 1 cost ``T²/2`` steps per window, so the check runs on
at most ``STREAM_WINDOWS`` windows of each set (the first ones; the report says how many).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from seqgate.onnxfile.probes import read_probe_map

Array = np.ndarray[Any, Any]
Feeds = dict[str, Array]
CHUNK_SIZES = (1, 7)  # one sample per call, and a prime that does not divide common window lengths
STREAM_WINDOWS = 4


@dataclass
class _Track:
    """Max |Δ| and tolerance verdict along one stream (one chunk size)."""

    chunk: int
    per_chunk: list[float] = field(default_factory=list)  # vs the whole-window run of the file
    per_chunk_source: list[float] = field(default_factory=list)  # vs the source framework
    failures: list[str] = field(default_factory=list)
    right_first: dict[str, bool] = field(default_factory=dict)  # state output → right after chunk 1

    def merge(self, k: int, d: float, source: bool) -> None:
        arr = self.per_chunk_source if source else self.per_chunk
        while len(arr) <= k:
            arr.append(0.0)
        arr[k] = max(arr[k], d)

    def to_json(self) -> dict[str, Any]:
        return {"chunk": self.chunk, "passed": not self.failures, "calls": len(self.per_chunk),
                "max_abs": max(self.per_chunk, default=0.0),
                "max_abs_source": max(self.per_chunk_source, default=None) if self.per_chunk_source else None,
                "per_chunk_max_abs": self.per_chunk, "per_chunk_source_max_abs": self.per_chunk_source,
                "failures": self.failures}


def chunk_sizes(user: int | None) -> list[int]:
    """1, 7 and the user's size (when given and not one of those)."""
    return sorted({*CHUNK_SIZES, *([user] if user else [])})


class StreamChecker:
    """Runs the check of the module docstring for one streaming ``model`` (an ``onnx.ModelProto``)."""

    def __init__(self, model: Any, atol: float, rtol: float) -> None:
        from seqgate.export.streaming import read_streaming
        from seqgate.runtimes.onnx import OnnxRunner

        info = read_streaming(model)
        assert info is not None, "not a streaming file"
        self.info, self.atol, self.rtol = info, atol, rtol
        self.probes = [p for p in read_probe_map(model) if p.kind in ("hidden_final", "cell_final")]
        self.runner = OnnxRunner(model, self.probes)
        self.seq_inputs = {i["name"]: i["time_axis"] for i in info["inputs"]}
        self.timed = {o["name"]: o["time_axis"] for o in info["outputs"]}
        self.states = info["states"]

    def _delta(self, got: Array, ref: Array) -> tuple[float, bool]:
        g, r = np.asarray(got, np.float64), np.asarray(ref, np.float64)
        if g.shape != r.shape:
            return float("inf"), False
        d = np.abs(g - r)
        return float(d.max(initial=0.0)), bool((d <= self.atol + self.rtol * np.abs(r)).all())

    def _run(self, feeds: Feeds, states: Feeds | None = None) -> dict[str, Array]:
        return self.runner.run({**feeds, **(states or {})})

    def state_refs(self, run: dict[str, Array]) -> dict[tuple[str, str], Array]:
        """(layer, "h"|"c") → the probe value ``[1, N, H]`` of a run (ONNX state layout)."""
        refs = {}
        for p in self.probes:
            if p.kind in ("hidden_final", "cell_final") and p.direction == "forward":
                prefix = p.name.rsplit("/", 2)[0]
                refs[(prefix, "h" if p.kind == "hidden_final" else "c")] = np.moveaxis(run[p.name], 1, 0)
        return refs

    def check(self, feeds: Feeds, sizes: list[int], source: dict[str, Array] | None) -> list[_Track]:
        """One batch of windows through every chunk size; returns one track per size."""
        steps = next(v.shape[a] for k, v in feeds.items() if k in self.seq_inputs
                     for a in [self.seq_inputs[k]])
        whole = self._run(feeds)
        prefix: dict[int, dict[str, Array]] = {}
        tracks = []
        for c in sizes:
            track = _Track(c)
            self._stream(feeds, steps, c, whole, prefix, source, track)
            tracks.append(track)
        return tracks

    def _prefix(self, feeds: Feeds, e: int, cache: dict[int, dict[str, Array]]) -> dict[str, Array]:
        if e not in cache:
            cache[e] = self._run(self._slice(feeds, 0, e))
        return cache[e]

    def _slice(self, feeds: Feeds, a: int, e: int) -> Feeds:
        out = {}
        for k, v in feeds.items():
            ax = self.seq_inputs.get(k)
            out[k] = v if ax is None else np.take(v, np.arange(a, e), axis=ax)
        return out

    def _stream(self, feeds: Feeds, steps: int, c: int, whole: dict[str, Array],
                cache: dict[int, dict[str, Array]], source: dict[str, Array] | None, track: _Track) -> None:
        states: Feeds = {}
        for k, a in enumerate(range(0, steps, c)):
            e = min(a + c, steps)
            got = self._run(self._slice(feeds, a, e), states)
            ref = self._prefix(feeds, e, cache)
            self._states(k, got, ref, track)
            self._outputs(k, a, e, got, whole, ref, track)
            if source is not None:
                self._against_source(k, a, e, steps, got, source, track)
            states = {s["input"]: got[s["output"]] for s in self.states}

    def _outputs(self, k: int, a: int, e: int, got: dict[str, Array], whole: dict[str, Array],
                 ref: dict[str, Array], track: _Track) -> None:
        """Per-step outputs against the whole run's steps; summaries against the prefix run."""
        for name, ax in self.timed.items():
            want = np.take(whole[name], np.arange(a, e), axis=ax) if ax is not None else ref[name]
            d, ok = self._delta(got[name], want)
            track.merge(k, d, False)
            if not ok:
                _fail(track, f"output '{name}' after chunk {k + 1} (steps {a}..{e - 1}) differs from the "
                             f"whole-window run (max |Δ| {d:.3g})")

    def _states(self, k: int, got: dict[str, Array], ref: dict[str, Array], track: _Track) -> None:
        refs = self.state_refs(ref)
        for s in self.states:
            want = refs.get((s["layer"], s["state"]))
            if want is None:
                continue
            d, ok = self._delta(got[s["output"]], want)
            track.merge(k, d, False)
            if k == 0:
                track.right_first[s["output"]] = ok
            if not ok:
                _fail(track, self._diagnose(s, k, got[s["output"]], refs, d, track.right_first))

    def _diagnose(self, s: dict[str, Any], k: int, value: Array, refs: dict[tuple[str, str], Array],
                  d: float, right_first: dict[str, bool]) -> str:
        head = (f"state '{s['output']}' (layer {s['layer']}, {s['state']}) after chunk {k + 1} differs from "
                f"the layer's own state in the whole-window run (max |Δ| {d:.3g})")
        other = "c" if s["state"] == "h" else "h"
        if (s["layer"], other) in refs and self._delta(value, refs[(s["layer"], other)])[1]:
            return f"{head}: it holds the layer's {other} — c and h are swapped"
        for (layer, st), want in refs.items():
            if layer != s["layer"] and self._delta(value, want)[1]:
                return f"{head}: it holds layer {layer}'s {st} — the state output is wired to the wrong layer"
        if k > 0 and right_first.get(s["output"]):
            return (f"{head}, though it was right after the first chunk: the state is not fed forward — check "
                    f"that '{s['output']}' goes back in as '{s['input']}' and that input reaches the layer")
        return head

    def _against_source(self, k: int, a: int, e: int, steps: int, got: dict[str, Array],
                        source: dict[str, Array], track: _Track) -> None:
        timed = {n: ax for n, ax in self.timed.items() if ax is not None}
        for name, ax in timed.items():
            if name in source:
                d, ok = self._delta(got[name], np.take(source[name], np.arange(a, e), axis=ax))
                track.merge(k, d, True)
                if not ok:
                    _fail(track, f"output '{name}' after chunk {k + 1} differs from the source framework "
                                 f"(max |Δ| {d:.3g})")
        for s in self.states:
            want = _source_state(source, s, e, steps)
            if want is None:
                continue
            d, ok = self._delta(got[s["output"]], want)
            track.merge(k, d, True)
            if not ok:
                _fail(track, f"state '{s['output']}' after chunk {k + 1} differs from the source framework's "
                             f"state of layer {s['layer']} (max |Δ| {d:.3g})")
        if e == steps:
            for name, ax in self.timed.items():
                if ax is None and name in source:
                    d, ok = self._delta(got[name], source[name])
                    track.merge(k, d, True)
                    if not ok:
                        _fail(track, f"output '{name}' at the end of the stream differs from the source "
                                     f"framework (max |Δ| {d:.3g})")


def _source_state(source: dict[str, Array], s: dict[str, Any], e: int, steps: int) -> Array | None:
    """The source framework's state for pair ``s`` after step ``e−1`` in ONNX layout ``[1, N, H]``."""
    base = f"{s['layer']}/forward"
    if s["state"] == "h" and f"{base}/hidden_sequence" in source:
        return np.moveaxis(source[f"{base}/hidden_sequence"][:, e - 1], 1, 0)  # [N, 1, H] → [1, N, H]
    kind = "hidden_final" if s["state"] == "h" else "cell_final"
    if e == steps and f"{base}/{kind}" in source:
        return np.moveaxis(source[f"{base}/{kind}"], 1, 0)
    return None


def _fail(track: _Track, message: str) -> None:
    if message not in track.failures and len(track.failures) < 20:
        track.failures.append(message)


def streaming_check(model: Any, batches: list[tuple[str, Feeds]], atol: float, rtol: float,
                    chunk: int | None = None,
                    source_run: Callable[[Feeds], dict[str, Array]] | None = None) -> dict[str, Any]:
    """The ``streaming`` section of a verify report: every chunk size over ``batches``.

    ``batches`` are (set label, model-layout feeds of ≤ ``STREAM_WINDOWS`` windows); ``source_run``
    runs the source framework on feeds (outputs and probes, DESIGN.md axes).
    """
    checker = StreamChecker(model, atol, rtol)
    sizes = chunk_sizes(chunk)
    merged = {c: _Track(c) for c in sizes}
    windows = 0
    for label, feeds in batches:
        source = source_run(feeds) if source_run is not None else None
        windows += next(iter(feeds.values())).shape[0]
        for t in checker.check(feeds, sizes, source):
            m = merged[t.chunk]
            for k, d in enumerate(t.per_chunk):
                m.merge(k, d, False)
            for k, d in enumerate(t.per_chunk_source):
                m.merge(k, d, True)
            for f in t.failures:
                _fail(m, f"{label}: {f}")
    runs = [merged[c].to_json() for c in sizes]
    return {"passed": all(r["passed"] for r in runs), "chunk_sizes": sizes, "windows": windows,
            "atol": atol, "rtol": rtol, "compared_with_source": source_run is not None,
            "states": [{k: s[k] for k in ("layer", "state", "input", "output", "shape")}
                       for s in checker.states],
            "runs": runs}



def verify_streaming(model: Any, recs: list[Any], specs: list[Any],
                     source_run: Callable[[Feeds], dict[str, Array]], atol: float, rtol: float,
                     chunk: int | None) -> dict[str, Any]:
    """``streaming_check`` over the first ``STREAM_WINDOWS`` windows of every set of a verify run
    (a file with a fixed batch size B: the first B windows, the last one repeated if a set is shorter)."""
    from seqgate.runtimes.batches import fixed_batch, pad_rows
    from seqgate.verify.recordings import to_model_layout

    size = fixed_batch(model, outputs=False)
    batches = []
    for rec in recs:
        for _, feeds in rec.batches(size or STREAM_WINDOWS):
            if size:
                feeds = {k: pad_rows(v, size) for k, v in feeds.items()}
            batches.append((rec.label, to_model_layout(feeds, specs)))
            break
    return streaming_check(model, batches, atol, rtol, chunk, source_run)
