"""The verify pipeline's contract (seqgate.verify.pipeline docstring) with stand-in runners:
the values and order of a plain loop, runtimes not waiting for each other, errors at the
right batch, bounded run-ahead, first_batch timing, no thread left behind."""

from __future__ import annotations

import threading
import time
from typing import Any

import numpy as np
import pytest

from seqgate.verify.pipeline import inferred_batches
from seqgate.verify.recordings import InputSpec


class Boom(Exception):
    pass


class Runner:
    """Returns a value computed from the batch; can fail at a batch or wait on an event."""

    def __init__(self, scale: float, fail_at: int | None = None) -> None:
        self.scale, self.fail_at = scale, fail_at
        self.started: list[int] = []
        self.threads: set[str] = set()
        self.gate: dict[int, threading.Event] = {}  # batch -> event to wait for before running it
        self.on_start: dict[int, threading.Event] = {}  # batch -> event set when the run starts

    def run(self, feeds: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        k = int(feeds["x"][0, 0])
        self.started.append(k)
        self.threads.add(threading.current_thread().name)
        if k in self.on_start:
            self.on_start[k].set()
        if k in self.gate:
            assert self.gate[k].wait(10), f"batch {k} waited for the other runtime"
        if k == self.fail_at:
            raise Boom(f"{self.scale}@{k}")
        return {"y": feeds["x"] * self.scale}


def _batches(n: int, fail_at: int | None = None) -> Any:
    for k in range(n):
        if k == fail_at:
            raise Boom(f"reader@{k}")
        yield 4 * k, {"x": np.full((4, 3), float(k), np.float32)}


SPECS: list[InputSpec] = []  # no sequence input: model feeds are the feeds


def _no_threads_left() -> bool:
    return not [t for t in threading.enumerate() if t.name.startswith("seqgate-")]


@pytest.mark.parametrize("side_by_side", [True, False])
def test_values_and_order_of_a_plain_loop(side_by_side: bool) -> None:
    onnx, src = Runner(2.0), Runner(3.0)
    got = list(inferred_batches(_batches(6), onnx, src, SPECS, side_by_side=side_by_side))
    # the plain loop it must equal, computed directly
    want = [(4 * k, {"y": np.full((4, 3), 2.0 * k)}, {"y": np.full((4, 3), 3.0 * k)}) for k in range(6)]
    assert [g[0] for g in got] == [w[0] for w in want]
    for g, w in zip(got, want, strict=True):
        assert np.array_equal(g[3]["y"], w[1]["y"]) and np.array_equal(g[4]["y"], w[2]["y"])
        assert g[1] is g[2] or np.array_equal(g[1]["x"], g[2]["x"])
    assert _no_threads_left()


def test_runtimes_do_not_wait_for_each_other() -> None:
    # ONNX Runtime may not finish batch 0 before the source framework has started batch 1:
    # with a wait for both runtimes after each batch this would never happen (the gate times out).
    onnx, src = Runner(2.0), Runner(3.0)
    src.on_start[1] = threading.Event()
    onnx.gate[0] = src.on_start[1]
    got = list(inferred_batches(_batches(3), onnx, src, SPECS))
    assert len(got) == 3 and onnx.threads.isdisjoint(src.threads)


@pytest.mark.parametrize("onnx_fail, src_fail, reader_fail, message, yielded", [
    (2, 2, None, "2.0@2", 2),  # both fail on batch 2: ONNX Runtime's error first, as in a plain loop
    (2, 1, None, "3.0@1", 1),  # the source fails earlier: its error, at its batch
    (None, None, 3, "reader@3", 3),  # the window reader fails
])
def test_errors_are_raised_at_their_batch(onnx_fail: int | None, src_fail: int | None, reader_fail: int | None,
                                          message: str, yielded: int) -> None:
    onnx, src = Runner(2.0, onnx_fail), Runner(3.0, src_fail)
    seen = []
    with pytest.raises(Boom, match=message):
        for item in inferred_batches(_batches(6, reader_fail), onnx, src, SPECS):
            seen.append(item[0])
    assert seen == [4 * k for k in range(yielded)]
    assert _no_threads_left()


def test_run_ahead_is_bounded_and_an_early_stop_ends_every_thread() -> None:
    onnx, src = Runner(2.0), Runner(3.0)
    received = 0
    for _ in inferred_batches(_batches(50), onnx, src, SPECS):
        received += 1
        time.sleep(0.02)  # a slow comparison: give the runtimes every chance to run ahead
        # per runtime: the batch compared, one queued, one being computed
        assert len(onnx.started) <= received + 2 and len(src.started) <= received + 2
        if received == 5:
            break
    assert _no_threads_left()


def test_first_batch_runs_in_the_source_thread_before_its_second_run() -> None:
    onnx, src = Runner(2.0), Runner(3.0)
    calls: list[tuple[str, list[int]]] = []

    def first(model_feeds: dict[str, np.ndarray], values: dict[str, np.ndarray]) -> None:
        calls.append((threading.current_thread().name, list(src.started)))
        assert np.array_equal(values["y"], model_feeds["x"] * 3.0)

    list(inferred_batches(_batches(4), onnx, src, SPECS, first_batch=first))
    assert len(calls) == 1
    name, started = calls[0]
    assert started == [0] and name in src.threads
