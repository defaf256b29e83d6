"""Batches through both runtimes side by side, overlapped with the comparison of the previous batch.

Contract of :func:`inferred_batches`:

- yields ``(first window, feeds, model feeds, onnx values, source values)`` for every batch of
  the window iterator, in recording order — the same values a plain loop of
  ``onnx_runner.run`` then ``src_runner.run`` gives (each runtime's own computation is unchanged;
  only *when* it runs changes);
- a feeder thread reads the batches; one thread runs the source framework and another ONNX
  Runtime, each through the batches in order and independently of the other (no wait for the
  other runtime after each batch: a runtime that is faster on a batch goes on with the next
  one), while the caller compares the batch both have finished (both runtimes release the GIL
  inside their kernels);
- memory: per runtime at most three batches of values are alive (one being compared, one
  queued, one being computed), whatever the recording's length, and at most four batches of
  inputs besides;
- ``first_batch`` (optional) is called in the source thread right after the first batch's
  source run, before its next run (the runners' self-checks read state the next run
  overwrites);
- an exception in any thread is raised in the caller at the batch where it happened, ONNX
  Runtime's first when both runtimes fail on the same batch (as in a plain loop); a caller that
  stops early stops every thread (none is left running).

Threads (:func:`thread_plan`): with ``C`` usable cores, ONNX Runtime gets ``ceil(C/2)`` intra-op
threads and PyTorch ``floor(C/2)`` (at least 1 each), so the two runtimes running at the same
time do not oversubscribe the cores; neither spins while idle (``seqgate.runtimes.onnx``), and
the comparison (NumPy, one thread) fills the gaps. On 2 cores: 1 + 1. With
``side_by_side=False`` (one core) a single thread runs ONNX Runtime then the source on each batch.
"""

from __future__ import annotations

import os
import queue
import threading
from collections.abc import Callable, Iterable, Iterator
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
    in one thread (one core: running them at once gains nothing)."""
    stop = threading.Event()
    if side_by_side:
        jobs = [(onnx_runner.run, None), (src_runner.run, first_batch)]
    else:
        def both(model_feeds: Arrays) -> tuple[Arrays, Arrays]:
            return onnx_runner.run(model_feeds), src_runner.run(model_feeds)

        def first_of_both(model_feeds: Arrays, values: tuple[Arrays, Arrays]) -> None:
            assert first_batch is not None
            first_batch(model_feeds, values[1])

        jobs = [(both, first_of_both if first_batch is not None else None)]
    inboxes: list[queue.Queue[Any]] = [queue.Queue(maxsize=1) for _ in jobs]
    outboxes: list[queue.Queue[Any]] = [queue.Queue(maxsize=1) for _ in jobs]
    threads = [threading.Thread(target=_feed, name="seqgate-feed", daemon=True,
                                args=(batches, specs, inboxes, stop))]
    threads += [threading.Thread(target=_work, name=f"seqgate-infer{i}", daemon=True,
                                 args=(run, after_first, inboxes[i], outboxes[i], stop))
                for i, (run, after_first) in enumerate(jobs)]
    for t in threads:
        t.start()
    try:
        while True:
            got = []
            for box in outboxes:  # ONNX Runtime's box first: its error first, as in a plain loop
                item = box.get()
                if item is _DONE:
                    return
                if isinstance(item, BaseException):
                    raise item
                got.append(item)
            (start, feeds, model_feeds), a = got[0]
            s = got[1][1] if side_by_side else a[1]
            yield start, feeds, model_feeds, (a if side_by_side else a[0]), s
    finally:
        stop.set()
        for t in threads:
            t.join()


def _feed(batches: Iterable[tuple[int, Arrays]], specs: list[InputSpec], inboxes: list[queue.Queue[Any]],
          stop: threading.Event) -> None:
    """Hand every batch (with its model-layout feeds) to each runtime's thread, then ``_DONE``."""
    try:
        for start, feeds in batches:
            item = (start, feeds, to_model_layout(feeds, specs))
            for box in inboxes:
                if not _put(box, stop, item):
                    return
        end: Any = _DONE
    except BaseException as e:  # handed on, raised in the caller at this batch
        end = e
    for box in inboxes:
        _put(box, stop, end)


def _work(run: Callable[[Arrays], Any], after_first: Callable[[Arrays, Any], None] | None,
          inbox: queue.Queue[Any], outbox: queue.Queue[Any], stop: threading.Event) -> None:
    """Run one runtime through the batches in order; an error or the end is passed on and ends it."""
    while True:
        item = _get(inbox, stop)
        if item is None:
            return
        if item is _DONE or isinstance(item, BaseException):
            _put(outbox, stop, item)
            return
        try:
            value = run(item[2])
            if after_first is not None:
                after_first(item[2], value)
                after_first = None
        except BaseException as e:
            _put(outbox, stop, e)
            return
        if not _put(outbox, stop, (item, value)):
            return


def _get(box: queue.Queue[Any], stop: threading.Event) -> Any:
    """The next item, or None once ``stop`` is set."""
    while not stop.is_set():
        try:
            return box.get(timeout=0.05)
        except queue.Empty:
            continue
    return None


def _put(box: queue.Queue[Any], stop: threading.Event, item: Any) -> bool:
    """Put ``item``; False when ``stop`` was set first."""
    while not stop.is_set():
        try:
            box.put(item, timeout=0.05)
            return True
        except queue.Full:
            continue
    return False
