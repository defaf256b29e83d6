"""Verify on Ray: window ranges checked by worker actors, statistics merged as one pass would.

Contract of :func:`run_sharded`:

- Ray: ``cluster`` (``HOST:PORT``) connects to a running Ray cluster; otherwise an embedded
  local Ray with ``workers`` CPUs is started for this run and stopped after it (a Ray already
  running in this process is used as it is). The embedded Ray, and the driver of a loopback
  cluster address, stay on 127.0.0.1 (:func:`loopback_environment`): node address 127.0.0.1, no
  dashboard, usage statistics off, no request to cloud metadata servers.
- Workers: ``workers`` actors (0 with a cluster: one per CPU of the cluster), one CPU each.
  Each loads the ONNX file, the source model and the recordings once, from the *same paths*
  (made absolute here): every worker must be able to open them (a shared filesystem) and must
  run the same seqgate, framework and onnxruntime versions. Synthetic sets are made here and
  handed to the workers through Ray's object store.
- Ranges: each set is cut into consecutive ranges of whole batches (:func:`plan_ranges`); a
  range is handed to an idle worker; its result is kept once, by range index, so no range is
  counted twice; the run ends only when every range has a result, so none is skipped.
- A worker that dies (its process killed, its node lost) loses only its current range: the
  range goes back to the queue and another worker takes it; a replacement worker is started
  (at most ``workers`` replacements per run). An error raised by verify itself inside a worker
  (bad input, unsupported model) stops the run with that error, as in one process.
- Merge: per set, the ranges' per-tensor statistics are merged in recording order
  (``seqgate.verify.compare.merge_shards``): counts, maxima, the worst element (the earliest
  window on ties), the histogram behind ``p99_abs`` (so the same percentile and the same bound:
  at most 1/64 above numpy's ``method="higher"`` value) and the per-step curves equal a single
  pass over the same windows; ``mean_abs``/``rms`` differ only by summation order. The worst
  windows kept for the oracle merge likewise (:func:`seqgate.verify.checker.merge_worst`).
- Progress: after every range, ``progress.advance(n, detail)`` with that worker's windows/s
  (its pid) and the run's total windows/s. The returned record has per-worker windows, busy
  seconds and windows/s, the ranges retried and the merge time.
"""

from __future__ import annotations

import contextlib
import dataclasses
import importlib
import math
import os
import time
from collections import deque
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from seqgate.errors import BadInputError, SeqgateError
from seqgate.settings import Tolerances
from seqgate.sources.spec import Source
from seqgate.util.progress import SILENT, Progress
from seqgate.util.text import first_line
from seqgate.verify.checker import SetResult, merge_worst
from seqgate.verify.compare import TensorStats, merge_shards
from seqgate.verify.recordings import Recording, check_finite

LOOPBACK = "127.0.0.1"
RANGES_PER_WORKER = 4  # several ranges each: balance, and a dead worker loses little
OBJECT_STORE_BYTES = 256 * 2**20  # embedded Ray: synthetic sets and results are small


@dataclass(frozen=True)
class WorkerJob:
    """What every worker needs to check ranges exactly as the driver would."""

    model_path: str
    source: Source
    states: bool
    tol: Tolerances
    class_names: frozenset[str]
    batch: int
    sets: tuple[Any, ...]  # per set: an absolute path (recorded) or an object ref (synthetic)
    where: tuple[str, str]


@dataclass(frozen=True)
class Range:
    index: int
    set_index: int
    lo: int
    hi: int


@dataclass
class RangeResult:
    range: Range
    stats: dict[str, TensorStats]
    worst: list[Any]
    batch_axis: dict[str, int]
    seconds: float
    pid: int


@dataclass
class _Progress:
    """Windows and busy seconds per worker pid, for the progress line and the report."""

    started: float = field(default_factory=time.perf_counter)
    windows: dict[int, int] = field(default_factory=dict)
    seconds: dict[int, float] = field(default_factory=dict)
    retried: int = 0

    def add(self, res: RangeResult) -> str:
        n = res.range.hi - res.range.lo
        self.windows[res.pid] = self.windows.get(res.pid, 0) + n
        self.seconds[res.pid] = self.seconds.get(res.pid, 0.0) + res.seconds
        mine = self.windows[res.pid] / max(self.seconds[res.pid], 1e-9)
        total = sum(self.windows.values()) / max(time.perf_counter() - self.started, 1e-9)
        return (f"worker pid {res.pid} {mine:.0f} windows/s; {len(self.windows)} workers "
                f"{total:.0f} windows/s")

    def to_json(self) -> list[dict[str, Any]]:
        return [{"pid": pid, "windows": n, "seconds": round(self.seconds[pid], 3),
                 "windows_per_s": round(n / max(self.seconds[pid], 1e-9), 1)}
                for pid, n in sorted(self.windows.items())]


# ----- Ray ----------------------------------------------------------------------------------------
def _is_loopback(address: str) -> bool:
    host = address.removeprefix("ray://").rpartition(":")[0]
    return host == "localhost" or host.startswith("127.")


def loopback_environment() -> dict[str, str]:
    """Environment for a Ray confined to this machine (set before it starts; its processes inherit it):

    - ``RAY_USAGE_STATS_ENABLED=0``: no usage reports;
    - ``RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER=0``: Ray's own switch for single-machine use; every Ray
      process then takes 127.0.0.1 as its node address (``_node_ip_address="127.0.0.1"`` alone is
      turned back into the machine's interface address by Ray 2.60, measured here);
    - HTTP(S) proxies pointing at 127.0.0.1 port 9 (nothing listens there): Ray's head process
      asks cloud metadata servers (169.254.169.254, metadata.google.internal) which cloud it runs
      on even with usage statistics off (Ray 2.60, ``get_cluster_config_to_report``, measured
      here); with the proxy such a request goes to the loopback port and fails at once.
    """
    proxy = "http://127.0.0.1:9"
    return {"RAY_USAGE_STATS_ENABLED": "0", "RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER": "0",
            "http_proxy": proxy, "https_proxy": proxy, "HTTP_PROXY": proxy, "HTTPS_PROXY": proxy,
            "no_proxy": "", "NO_PROXY": ""}


def confine_to_loopback(ray: Any) -> None:
    """Ray reads ``RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER`` once, when it is first imported: when this
    process imported it earlier, the same switch is set on Ray's constants module (read at call
    time by its node-address lookup), so the loopback address is not replaced by the interface's."""
    importlib.import_module("ray._private.ray_constants").ENABLE_RAY_CLUSTER = False


@contextlib.contextmanager
def _environment(values: dict[str, str]) -> Iterator[None]:
    saved = {k: os.environ.get(k) for k in values}
    os.environ.update(values)
    try:
        yield
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


@contextlib.contextmanager
def ray_session(workers: int, cluster: str) -> Iterator[Any]:
    """Ray for one run (module docstring); yields the ``ray`` module."""
    local = not cluster or _is_loopback(cluster)
    env = loopback_environment() if local else {"RAY_USAGE_STATS_ENABLED": "0"}
    with _environment(env):  # before Ray is imported or started
        try:
            import ray
        except ImportError as e:
            raise BadInputError("verify --workers/--cluster needs Ray: pip install 'seqgate[cluster]'.") from e
        if ray.is_initialized():
            yield ray
            return
        if local:
            confine_to_loopback(ray)
        _init(ray, workers, cluster, local)
        try:
            yield ray
        finally:
            ray.shutdown()


def _init(ray: Any, workers: int, cluster: str, local: bool) -> None:
    quiet: dict[str, Any] = {"log_to_driver": False, "logging_level": "ERROR", "namespace": "seqgate"}
    ip = {"_node_ip_address": LOOPBACK} if local else {}
    try:
        if cluster:
            ray.init(address=cluster, **ip, **quiet)
        else:
            ray.init(num_cpus=workers, include_dashboard=False, object_store_memory=OBJECT_STORE_BYTES,
                     **ip, **quiet)
    except (ConnectionError, RuntimeError, ValueError) as e:
        where = f"the Ray cluster at {cluster}" if cluster else "a local Ray"
        raise BadInputError(f"cannot start or reach {where}: {first_line(e)}. "
                            f"Check the address (`ray status` on the head node).") from e


# ----- the worker -----------------------------------------------------------------------------------
class RangeChecker:
    """A worker: loads the model, both runtimes and the recordings once; checks ranges."""

    def __init__(self, job: WorkerJob) -> None:
        from seqgate.onnxfile.input_meta import read_structure
        from seqgate.onnxfile.load import load_onnx
        from seqgate.onnxfile.probes import read_probe_map
        from seqgate.runtimes.factory import load_source_model, open_source_runner
        from seqgate.runtimes.onnx import OnnxRunner
        from seqgate.verify.checker import Comparer, output_dims, tensor_infos
        from seqgate.verify.pipeline import thread_plan
        from seqgate.verify.recordings import input_specs

        model = load_onnx(Path(job.model_path))
        probes = read_probe_map(model) if job.states else []
        specs = input_specs(model)
        plan = thread_plan(1)  # one CPU per worker
        self.onnx = OnnxRunner(model, probes, threads=plan.onnx)
        loaded = load_source_model(job.source, plan.source)
        self.src = open_source_runner(job.source, probes, [o.name for o in model.graph.output], job.states,
                                      loaded=loaded, structure=read_structure(model))
        if job.source.framework == "torch":
            self.src.run_threads = plan.source
        self.comparer = Comparer(tensor_infos(model, probes), job.tol, set(job.class_names), specs,
                                 output_dims(model))
        self.comparer.where = job.where
        self.comparer.side_by_side = False  # one CPU per worker: the runtimes take turns
        self.job, self.specs = job, specs
        self._sets: dict[int, Recording] = {}
        self._check = [True]

    def pid(self) -> int:
        return os.getpid()

    def _set(self, i: int) -> Recording:
        if i not in self._sets:
            from seqgate.verify.recordings import load_recording

            ref = self.job.sets[i]
            if isinstance(ref, str):
                self._sets[i] = load_recording(ref, self.specs, hashed=False)
            else:  # a synthetic set in the object store
                import ray

                self._sets[i] = ray.get(ref)
        return self._sets[i]

    def check(self, r: Range) -> RangeResult:
        t0 = time.perf_counter()
        rec = self._set(r.set_index)
        res = self.comparer.run_batches(rec, _range_batches(rec, r.lo, r.hi, self.job.batch), self.onnx,
                                        self.src, SILENT, self._check)
        return RangeResult(r, res.stats, res.worst, dict(self.comparer.batch_axis), time.perf_counter() - t0,
                           os.getpid())


def _range_batches(rec: Recording, lo: int, hi: int, batch: int) -> Iterator[tuple[int, dict[str, Any]]]:
    for start in range(lo, hi, batch):
        stop = min(start + batch, hi)
        feeds = {name: a.read(start, stop) for name, a in rec.arrays.items()}
        for name, x in feeds.items():
            check_finite(x, start, f"{rec.label} array {name!r}")
        yield start, feeds


# ----- the driver -----------------------------------------------------------------------------------
def plan_ranges(windows: list[int], batch: int, workers: int) -> list[Range]:
    """Consecutive ranges of whole batches covering every window of every set exactly once."""
    total = sum(windows)
    per = max(batch, math.ceil(total / max(workers * RANGES_PER_WORKER, 1) / batch) * batch)
    out: list[Range] = []
    for s, n in enumerate(windows):
        for lo in range(0, n, per):
            out.append(Range(len(out), s, lo, min(lo + per, n)))
    return out


def absolute_source(src: Source) -> Source:
    """``src`` with absolute file paths (workers may run in another directory)."""
    files = (("path", src.path), ("weights", src.weights), ("custom_code", src.custom_code))
    fix = {k: Path(v).resolve() for k, v in files if v is not None}
    return dataclasses.replace(src, **fix)


def run_sharded(job: WorkerJob, recs: list[Recording], workers: int, cluster: str,
                progress: Progress) -> tuple[list[SetResult], dict[str, int], dict[str, Any]]:
    """Check every window of ``recs`` on Ray workers (module docstring).

    Returns the per-set results (as one pass would give), the tensors' batch axes and the
    ``workers`` record of the report."""
    with ray_session(workers, cluster) as ray:
        count = workers or max(1, int(ray.cluster_resources().get("CPU", 1)))
        sets = tuple(str(Path(r.path).resolve()) if r.kind == "recorded" and r.path else ray.put(r)
                     for r in recs)
        job = dataclasses.replace(job, sets=sets)
        ranges = plan_ranges([r.windows for r in recs], job.batch, count)
        progress.start(f"verifying {len(recs)} window set{'s' if len(recs) != 1 else ''} on {count} Ray "
                       f"workers", sum(r.windows for r in recs))
        tally = _Progress()
        results = _dispatch(ray, job, ranges, count, progress, tally)
        progress.finish()
    t0 = time.perf_counter()
    merged, batch_axis = _merge(recs, ranges, results)
    record = {"count": count, "cluster": cluster or None, "ranges": len(ranges), "retried": tally.retried,
              "per_worker": tally.to_json(), "merge_seconds": round(time.perf_counter() - t0, 4)}
    return merged, batch_axis, record


def _dispatch(ray: Any, job: WorkerJob, ranges: list[Range], count: int, progress: Progress,
              tally: _Progress) -> dict[int, RangeResult]:
    """Hand ranges to idle workers until every range has a result; requeue a dead worker's range."""
    actor_cls = ray.remote(num_cpus=1, max_restarts=0)(RangeChecker)
    idle = deque(actor_cls.remote(job) for _ in range(count))
    queue = deque(ranges)
    running: dict[Any, tuple[Any, Range]] = {}
    results: dict[int, RangeResult] = {}
    replacements = count
    while len(results) < len(ranges):
        while idle and queue:
            actor, r = idle.popleft(), queue.popleft()
            running[actor.check.remote(r)] = (actor, r)
        if not running:
            raise BadInputError(f"every Ray worker died; {len(ranges) - len(results)} window ranges were not "
                                f"checked. See the Ray logs on the worker machines (out of memory?).")
        ready, _ = ray.wait(list(running), num_returns=1)
        actor, r = running.pop(ready[0])
        try:
            res = ray.get(ready[0])
        except ray.exceptions.RayTaskError as e:  # verify's own error inside the worker: as in one process
            cause = getattr(e, "cause", None)
            raise (cause if isinstance(cause, SeqgateError) else e) from None
        except (ray.exceptions.RayActorError, ray.exceptions.WorkerCrashedError):
            tally.retried += 1
            queue.appendleft(r)  # the lost range goes first to the next idle worker
            if replacements > 0:
                replacements -= 1
                idle.append(actor_cls.remote(job))
            continue
        idle.append(actor)
        if r.index not in results:
            results[r.index] = res
            progress.advance(r.hi - r.lo, tally.add(res))
    return results


def _merge(recs: list[Recording], ranges: list[Range],
           results: dict[int, RangeResult]) -> tuple[list[SetResult], dict[str, int]]:
    batch_axis: dict[str, int] = {}
    merged = []
    for s, rec in enumerate(recs):
        parts = [results[r.index] for r in ranges if r.set_index == s]  # recording order
        stats: dict[str, TensorStats] = {}
        for name in (parts[0].stats if parts else {}):
            stats[name] = merge_shards([p.stats[name] for p in parts if name in p.stats])
        for p in parts:
            batch_axis = {**p.batch_axis, **batch_axis}
        merged.append(SetResult(rec, stats, merge_worst([p.worst for p in parts])))
    return merged, batch_axis


def window_count(results: list[SetResult]) -> int:
    """Windows compared (the first tensor's count per set), for a check that nothing was skipped."""
    return int(sum(next(iter(r.stats.values())).windows for r in results if r.stats))

