"""The batch loop of verify: one window set through both runners, per-tensor stats kept streaming.

:class:`Comparer` is shared by the in-process run (``seqgate.verify.run``) and the cluster
workers (``seqgate.verify.cluster``), so both compute exactly the same statistics; the rules
it applies (batch-major outputs, time-indexed outputs, the worst windows kept for the oracle)
are those of ``seqgate.verify.run``'s module docstring. :func:`merge_worst` combines the worst
windows kept by several window ranges of one set.
"""

from __future__ import annotations

import heapq
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np

from seqgate.errors import Unsupported, UnsupportedModelError
from seqgate.onnxfile.probes import Probe
from seqgate.settings import Tolerances
from seqgate.util.progress import Progress
from seqgate.verify.compare import TensorStats
from seqgate.verify.pipeline import inferred_batches
from seqgate.verify.recordings import InputSpec, Recording

WORST_KEPT = 3  # windows per set kept for the oracle
Worst = list[tuple[float, int, dict[str, np.ndarray[Any, Any]]]]


@dataclass(frozen=True)
class TensorInfo:
    name: str
    kind: str  # output | hidden_sequence | hidden_final | cell_final
    layer: str | None = None
    direction: str | None = None




def output_dims(model: Any) -> dict[str, list[Any]]:
    from seqgate.onnxfile.load import value_dims

    return {o.name: value_dims(o) for o in model.graph.output}


def tensor_infos(model: Any, probes: list[Probe]) -> list[TensorInfo]:
    infos = [TensorInfo(p.name, p.kind, p.layer, p.direction) for p in probes]
    return infos + [TensorInfo(o.name, "output") for o in model.graph.output]


@dataclass
class SetResult:
    """One window set's per-tensor stats and its worst windows (heap of (score, -window, feeds))."""

    recording: Recording
    stats: dict[str, TensorStats]
    worst: Worst


class Comparer:
    """Runs one window set through both runners and keeps per-tensor stats (module docstring)."""

    def __init__(self, infos: list[TensorInfo], tol: Tolerances, class_names: set[str], specs: list[InputSpec],
                 out_dims: dict[str, list[Any]]):
        self.infos, self.tol, self.class_names, self.out_dims = infos, tol, class_names, out_dims
        self.specs = specs
        self.seq_input = next((s.name for s in specs if s.is_sequence), None)
        self.time_dims = {s.window_dims[1] for s in specs
                          if s.is_sequence and isinstance(s.window_dims[1], str)}
        self.batch_dims = {s.window_dims[0] for s in specs if s.dims and isinstance(s.window_dims[0], str)}
        self.batch_axis: dict[str, int] = {}
        self.where = ("the ONNX file", "the source")  # (model label, source text) for messages
        self.observe: Any = None  # called (recording, first window, onnx outputs, source outputs) per batch
        self.side_by_side = True  # both runtimes at once (seqgate.verify.pipeline); False on one core
        self.window_scores = True  # keep the worst windows (only the oracle reads them)

    def _find_batch_axis(self, name: str, shape: tuple[int, ...], n: int) -> int:
        """Outputs may hold the windows on another axis (PyTorch ``h_n`` is ``[L·D, N, H]``)."""
        dims = self.out_dims.get(name, [])
        named = [i for i, d in enumerate(dims) if d in self.batch_dims]
        if named:
            return named[0]
        sized = [i for i, d in enumerate(shape) if d == n]
        return 0 if not sized or sized[0] == 0 else sized[0]

    def to_batch_major(self, name: str, x: np.ndarray[Any, Any]) -> np.ndarray[Any, Any]:
        ax = self.batch_axis.get(name, 0)
        return x if ax == 0 else np.moveaxis(x, ax, 0)

    def _timed_output(self, name: str, shape: tuple[int, ...], steps: int | None) -> bool:
        """Axis 1 is time: the ONNX dim names the input's time dim, else (unknown dim) its length matches."""
        if len(shape) < 3:
            return False
        dims = list(self.out_dims.get(name, []))
        ax = self.batch_axis.get(name, 0)
        if ax and len(dims) > ax:
            dims.insert(0, dims.pop(ax))
        d1 = dims[1] if len(dims) > 1 else None
        if isinstance(d1, str) and d1:
            return d1 in self.time_dims
        return d1 is None and shape[1] == steps

    def new_stats(self, feeds: dict[str, np.ndarray[Any, Any]], first: dict[str, np.ndarray[Any, Any]]
                  ) -> dict[str, TensorStats]:
        steps = feeds[self.seq_input].shape[1] if self.seq_input else None
        n = next(iter(feeds.values())).shape[0]
        out = {}
        for t in self.infos:
            a, r = self.tol.for_tensor(t.name)
            if t.kind == "output":
                self.batch_axis[t.name] = self._find_batch_axis(t.name, first[t.name].shape, n)
            shape = self.to_batch_major(t.name, first[t.name]).shape
            timed = t.kind == "hidden_sequence" or (
                t.kind == "output" and self._timed_output(t.name, shape, steps))
            out[t.name] = TensorStats(a, r, timed, t.name in self.class_names, window_scores=self.window_scores)
        return out

    def run_set(self, rec: Recording, onnx_runner: Any, src_runner: Any, batch: int,
                progress: Progress, check: list[bool]) -> SetResult:
        return self.run_batches(rec, rec.batches(batch), onnx_runner, src_runner, progress, check)

    def run_batches(self, rec: Recording, batches: Iterable[tuple[int, dict[str, np.ndarray[Any, Any]]]],
                    onnx_runner: Any, src_runner: Any, progress: Progress, check: list[bool]) -> SetResult:
        """Compare ``batches`` of ``rec`` (any run of its windows); batch k+1's inference overlaps
        batch k's comparison (``seqgate.verify.pipeline``)."""
        stats: dict[str, TensorStats] = {}
        worst: Worst = []

        def first(model_feeds: dict[str, np.ndarray[Any, Any]], got: dict[str, Any]) -> None:
            check[0] = False
            _self_check(src_runner, model_feeds, got)

        pipeline = inferred_batches(batches, onnx_runner, src_runner, self.specs, first if check[0] else None,
                                    self.side_by_side)
        for start, feeds, model_feeds, a, s in pipeline:
            if not stats:
                stats = self.new_stats(feeds, s)
            if self.observe is not None:
                self.observe(rec, start, a, s)
            score = np.zeros(next(iter(feeds.values())).shape[0])
            for t in self.infos:
                _check_shapes(t, a[t.name], s[t.name], self.where)
                st = stats[t.name]
                st.update(self.to_batch_major(t.name, a[t.name]), self.to_batch_major(t.name, s[t.name]), start)
                # A state whose leading axis is not the windows (a model that folds windows into
                # its batch, [k·N, H]) has no per-window score; its statistics still count.
                if st.window_max is not None and st.window_max.shape == score.shape:
                    score = np.maximum(score, st.window_max)
            if self.window_scores:
                _keep_worst(worst, score, start, model_feeds)
            progress.advance(len(score), rec.label)
        for st in stats.values():
            st.release()
        return SetResult(rec, stats, worst)


def _self_check(runner: Any, feeds: dict[str, np.ndarray[Any, Any]], got: dict[str, Any]) -> None:
    check = getattr(runner, "self_check", None)
    if check is None:
        return
    d = check(feeds, got)
    if d > runner.self_check_atol:
        raise UnsupportedModelError("the source model", [Unsupported(
            "state capture", f"re-executing the model to read its states changes its outputs (max |Δ| {d:.3g})",
            "run with --no-states to compare outputs only, and report this model to the seqgate developers")])


def _check_shapes(t: TensorInfo, a: np.ndarray[Any, Any], s: np.ndarray[Any, Any],
                  where: tuple[str, str]) -> None:
    """A tensor shaped differently on the two sides: the file does not fit the source (exit 2)."""
    if a.shape != s.shape:
        from seqgate.verify.interface import shape_error

        raise shape_error(t.name, a.shape, s.shape, *where)


def _keep_worst(worst: list[Any], score: np.ndarray[Any, Any], start: int, feeds: dict[str, Any]) -> None:
    for i in np.argsort(-score)[:WORST_KEPT]:
        item = (float(score[i]), -(start + int(i)), {k: v[i:i + 1].copy() for k, v in feeds.items()})
        if len(worst) < WORST_KEPT:
            heapq.heappush(worst, item)  # type: ignore[misc]
        elif item[0] > worst[0][0]:
            heapq.heapreplace(worst, item)  # type: ignore[misc]


def merge_worst(parts: list[Worst]) -> Worst:
    """The ``WORST_KEPT`` highest-scoring windows of several ranges (ties: the earliest window)."""
    items = sorted((it for p in parts for it in p), key=lambda it: (-it[0], -it[1]))[:WORST_KEPT]
    heapq.heapify(items)  # type: ignore[misc]
    return items
