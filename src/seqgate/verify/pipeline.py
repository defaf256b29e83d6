"""Batches through both runtimes side by side, overlapped with the comparison of the previous batch.

Contract of :func:`inferred_batches`:

- yields ``(first window, feeds, model feeds, onnx values, source values)`` for every batch of
  the window iterator, in recording order — the same values a plain loop of
  ``onnx_runner.run`` then ``src_runner.run`` gives (each runtime's own computation is unchanged;
  only *when* it runs changes);
- while the caller compares batch k, batch k+1 is computed: a producer thread runs the source
  framework and a second thread runs ONNX Runtime on the same batch at the same time (both
  release the GIL inside their kernels);
- memory: at most three batches are alive (one being compared, one queued, one being
  computed), whatever the recording's length;
- ``first_batch`` (optional) is called in the producer thread right after the first batch's
  source run, before the next batch starts (the runners' self-checks read state the next run
  overwrites);
- an exception in either thread is raised in the caller at the batch where it happened; a
  caller that stops early stops the producer (no thread is left running).

Threads (:func:`thread_plan`): with ``C`` usable cores, ONNX Runtime gets ``ceil(C/2)`` intra-op
threads and PyTorch ``floor(C/2)`` (at least 1 each), so the two runtimes running at the same
time do not oversubscribe the cores; neither spins while idle (``seqgate.runtimes.onnx``), and
the comparison (NumPy, one thread) fills the gaps. On 2 cores: 1 + 1.
"""

from __future__ import annotations

import os
import queue
import threading
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np

from seqgate.verify.recordings import InputSpec, to_model_layout

Arrays = dict[str, np.ndarray[Any, Any]]
Batch = tuple[int, Arrays, Arrays, Arrays, Arrays]
_DONE = object()


@dataclass(frozen=True)
class ThreadPlan:
    """Intra-op threads of each runtime while both run at once (module docstring)."""

    onnx: int
    source: int


def usable_cores() -> int:
    """The cores this process may run on (its CPU affinity, else ``os.cpu_count()``)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def thread_plan(cores: int | None = None) -> ThreadPlan:
    c = usable_cores() if cores is None else max(1, cores)
    return ThreadPlan(onnx=max(1, (c + 1) // 2), source=max(1, c // 2))


def inferred_batches(batches: Iterable[tuple[int, Arrays]], onnx_runner: Any, src_runner: Any,
                     specs: list[InputSpec], first_batch: Callable[[Arrays, Arrays], None] | None = None,
                     side_by_side: bool = True) -> Iterator[Batch]:
    """See the module docstring; ``side_by_side=False`` runs the two runtimes one after the other
    in the producer (one core: running them at once gains nothing)."""
    out: queue.Queue[Any] = queue.Queue(maxsize=1)
    stop = threading.Event()
    producer = threading.Thread(target=_produce, name="seqgate-infer", daemon=True,
                                args=(batches, onnx_runner, src_runner, specs, first_batch, out, stop,
                                      side_by_side))
    producer.start()
    try:
        while True:
            item = out.get()
            if item is _DONE:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()
        while producer.is_alive():  # unblock a producer waiting on the full queue
            try:
                out.get(timeout=0.05)
            except queue.Empty:
                pass
        producer.join()


def _produce(batches: Iterable[tuple[int, Arrays]], onnx_runner: Any, src_runner: Any,
             specs: list[InputSpec], first_batch: Callable[[Arrays, Arrays], None] | None,
             out: queue.Queue[Any], stop: threading.Event, side_by_side: bool) -> None:
    try:
        with ThreadPoolExecutor(1, thread_name_prefix="seqgate-onnx") as pool:
            for start, feeds in batches:
                if stop.is_set():
                    return
                model_feeds = to_model_layout(feeds, specs)
                run_onnx = pool.submit if side_by_side else _now
                onnx_future = run_onnx(onnx_runner.run, model_feeds)
                failed: BaseException | None = None
                try:
                    s = src_runner.run(model_feeds)
                except BaseException as e:
                    failed = e
                a = onnx_future.result()  # ONNX Runtime's error first, as in a plain loop
                if failed is not None:
                    raise failed
                if first_batch is not None:
                    first_batch(model_feeds, s)
                    first_batch = None
                _put(out, stop, (start, feeds, model_feeds, a, s))
        _put(out, stop, _DONE)
    except BaseException as e:  # handed to the consumer, raised there
        _put(out, stop, e)


class _Done:
    """A finished call with a future's ``result()``."""

    def __init__(self, value: Any) -> None:
        self.value = value

    def result(self) -> Any:
        return self.value


def _now(fn: Callable[[Arrays], Arrays], feeds: Arrays) -> _Done:
    return _Done(fn(feeds))


def _put(out: queue.Queue[Any], stop: threading.Event, item: Any) -> None:
    while not stop.is_set():
        try:
            out.put(item, timeout=0.05)
            return
        except queue.Full:
            continue
