"""Benchmark: does the profiler's p50 agree with a bare ``perf_counter`` loop? (target 0.95–1.05)

A demo-sized model (Keras LSTM I=8 H=64 → Dense 4, exported by seqgate) at T=128, batch 1,
1 thread. One onnxruntime session, one set of inputs; in each round the profiler's timing loop
(``seqgate.profile.run.time_call`` on ``OnnxRunner.timed_call``, exactly what ``profile_model`` times) and an
independent bare loop (``time.perf_counter`` around ``session.run``, median by
``statistics.median``) run back to back, their order alternating between rounds so drift on a
shared machine falls on both. The headline figure is the median over rounds of the per-round
ratio profiler p50 / bare p50 (paired, so slow spells of the machine cancel); the ratio of the
overall medians is printed beside it. Exit 1 when the headline is outside the target.
"""

from __future__ import annotations

import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "3")
os.environ.setdefault("KERAS_BACKEND", "tensorflow")

T, BATCH, THREADS = 128, 1, 1
ROUNDS, RUNS = 20, 200
LOW, HIGH = 0.95, 1.05


def _export(d: Path) -> Path:
    import numpy as np

    from seqgate.export.run import export_source
    from seqgate.util.frameworks import import_keras

    keras = import_keras()
    m = keras.Sequential([keras.Input((None, 8)), keras.layers.LSTM(64), keras.layers.Dense(4)])
    rng = np.random.default_rng(0)
    m.set_weights([rng.normal(0, 0.2, tuple(w.shape)).astype(np.float32) for w in m.weights])
    m.save(d / "demo.keras")
    export_source(str(d / "demo.keras"), d / "demo.onnx")
    return d / "demo.onnx"


def _bare(sess: object, feeds: dict[str, object], n: int) -> float:
    """Median ms of ``n`` runs, timed with nothing but perf_counter (after 10 warm-up runs)."""
    names = [o.name for o in sess.get_outputs()]  # type: ignore[attr-defined]
    for _ in range(10):
        sess.run(names, feeds)  # type: ignore[attr-defined]
    ts = []
    for _ in range(n):
        t0 = time.perf_counter()
        sess.run(names, feeds)  # type: ignore[attr-defined]
        ts.append(time.perf_counter() - t0)
    return statistics.median(ts) * 1e3


def main() -> int:
    import onnx

    from seqgate.profile.inputs import make_inputs, plan_inputs
    from seqgate.profile.run import time_call
    from seqgate.profile.stats import summarize_ns
    from seqgate.runtimes.onnx import OnnxRunner

    with tempfile.TemporaryDirectory() as tmp:
        path = _export(Path(tmp))
        model = onnx.load(str(path))
        runner = OnnxRunner(model, [], THREADS, timing=True)
        sess = runner.session
        feeds = make_inputs(plan_inputs(model), BATCH, T, seed=0)
        prof, bare = [], []
        for r in range(ROUNDS):
            order = ("profiler", "bare") if r % 2 == 0 else ("bare", "profiler")
            for which in order:
                if which == "profiler":
                    with runner.timed_call(feeds) as call:
                        prof.append(summarize_ns(time_call(call, 10, RUNS, 0.0)).p50_ms)
                else:
                    bare.append(_bare(sess, feeds, RUNS))
    p, b = statistics.median(prof), statistics.median(bare)
    ratio = p / b
    per_round = statistics.median(x / y for x, y in zip(prof, bare, strict=True))
    print(f"model: Keras LSTM I=8 H=64 → Dense 4, T={T}, batch {BATCH}, {THREADS} thread; "
          f"{ROUNDS} interleaved rounds × {RUNS} runs")
    print(f"profiler p50  {p:.4f} ms   (rounds: {min(prof):.4f}..{max(prof):.4f})")
    print(f"bare loop p50 {b:.4f} ms   (rounds: {min(bare):.4f}..{max(bare):.4f})")
    ok = LOW <= per_round <= HIGH
    print(f"ratio profiler/bare = {per_round:.3f} (median of per-round ratios; ratio of overall "
          f"medians {ratio:.3f}); target {LOW}–{HIGH}: {'ok' if ok else 'OUTSIDE TARGET'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
