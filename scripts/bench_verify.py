"""Benchmark: verify's cost over bare inference, and its memory on a recording 10× a batch.

1. Time ratio (target ≤ 1.15), for a Keras and a PyTorch model (2 stacked LSTMs, FEATURES=32,
   H=128, T=100, 512 windows, batch 64):
   - bare  = for each batch, the source model's plain forward + onnxruntime (default session
     options) on the deployable file (outputs only), both warmed up;
   - verify loop = the same batches through verify's loop (runners with every probe and
     verify's thread plan, both runtimes side by side overlapped with the streaming comparison
     of every tensor), runners warmed up;
   - comparison CPU = the CPU time of the thread running verify's loop (it compares; the
     runtimes run in the pipeline's own threads), a figure a loaded machine disturbs less;
   - verify total = ``verify_model`` end to end (loading, tracing, hashing included), shown
     for information next to bare + model loading.
2. Peak memory (target: flat): ``verify_model`` in a fresh subprocess on a recording of one
   batch and of 10 batches (the batch working set: inputs, every probe and output of both
   runtimes); ru_maxrss of the child and tracemalloc's peak of Python/NumPy allocations.

Prints one line per figure. Run with ``scripts/bench verify``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "3")
os.environ.setdefault("KERAS_BACKEND", "tensorflow")

FEATURES, H, T, N, BATCH = 32, 128, 100, 512, 64

TORCH_NET = f'''
import torch
from torch import nn


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.rnn = nn.LSTM({FEATURES}, {H}, num_layers=2, batch_first=True)
        self.head = nn.Linear({H}, 4)

    def forward(self, x):
        y, _ = self.rnn(x)
        return self.head(y[:, -1])


def make():
    torch.manual_seed(0)
    return Net()
'''


def make_keras(d: Path) -> Path:
    from seqgate.util.frameworks import import_keras

    k = import_keras()
    x = k.Input((None, FEATURES), name="x")
    h = k.layers.LSTM(H, return_sequences=True, name="l1")(x)
    h = k.layers.LSTM(H, name="l2")(h)
    k.Model(x, k.layers.Dense(4, name="head")(h)).save(d / "m.keras")
    return d / "m.keras"


def make_torch(d: Path) -> tuple[str, Path]:
    import torch

    (d / "net.py").write_text(TORCH_NET)
    sys.path.insert(0, str(d))
    import net  # type: ignore[import-not-found]

    torch.save(net.make().state_dict(), d / "w.pt")
    return f"{d / 'net.py'}:make", d / "w.pt"


def _loop(fn: Any, x: np.ndarray) -> float:
    t0 = time.perf_counter()
    for s in range(0, len(x), BATCH):
        fn({"x": x[s:s + BATCH]})
    return time.perf_counter() - t0


def time_ratio(label: str, source: str, weights: str | None, onnx_path: Path, rec: Path, x: np.ndarray) -> None:
    import onnx

    from seqgate.onnxfile.probes import read_probe_map
    from seqgate.runtimes.factory import open_source_runner
    from seqgate.runtimes.onnx import OnnxRunner
    from seqgate.settings import Tolerances
    from seqgate.settings.defaults import ORACLE
    from seqgate.sources.spec import parse_source
    from seqgate.util.progress import SILENT
    from seqgate.verify.checker import Comparer, output_dims, tensor_infos
    from seqgate.verify.pipeline import thread_plan
    from seqgate.verify.recordings import input_specs, load_recording
    from seqgate.verify.run import verify_model

    model = onnx.load(str(onnx_path))
    probes = read_probe_map(model)
    names = [o.name for o in model.graph.output]
    src = parse_source(source, weights)
    bare_src = open_source_runner(src, [], names, states=False)
    import onnxruntime as ort

    plain = ort.InferenceSession(str(onnx_path), providers=["CPUExecutionProvider"])  # default options

    class _BareOrt:
        def run(self, feeds: dict[str, np.ndarray]) -> Any:
            return plain.run(None, feeds)

    bare_ort = _BareOrt()
    plan = thread_plan()  # as verify_model sets the runners up (seqgate.verify.pipeline)
    full_src = open_source_runner(src, probes, names, states=True)
    if src.framework == "torch":
        full_src.run_threads = plan.source
    full_ort = OnnxRunner(model, probes, threads=plan.onnx)
    for r in (bare_src, bare_ort, full_src, full_ort):  # warm up (tracing, first-run allocations)
        r.run({"x": x[:BATCH]})
        r.run({"x": x[:BATCH]})
    specs = input_specs(model)
    comparer = Comparer(tensor_infos(model, probes), Tolerances(), set(), specs, output_dims(model))
    comparer.window_scores = ORACLE  # as verify_model sets it: worst windows only for --oracle
    rec_obj = load_recording(rec, specs)
    best_bare, best_loop, best_cmp = float("inf"), float("inf"), float("inf")
    for _ in range(5):  # interleaved, best of 5: the machine is shared
        best_bare = min(best_bare, _loop(bare_src.run, x) + _loop(bare_ort.run, x))
        t0, c0 = time.perf_counter(), time.thread_time()
        comparer.run_set(rec_obj, full_ort, full_src, BATCH, SILENT, [False])
        best_loop = min(best_loop, time.perf_counter() - t0)
        # this thread only compares (the runtimes run in the pipeline's threads; waiting costs no CPU)
        best_cmp = min(best_cmp, time.thread_time() - c0)
    t0 = time.perf_counter()
    rep = verify_model(onnx_path, source, weights, recordings=[rec], batch_size=BATCH)
    total = time.perf_counter() - t0
    assert rep.passed, rep.headline()
    print(f"{label}: bare inference {best_bare:.3f} s, verify loop {best_loop:.3f} s "
          f"(ratio {best_loop / best_bare:.3f}, target <= 1.15); verify_model end to end {total:.2f} s "
          f"for {N} windows x {T} steps, {len(probes)} probes; comparison {best_cmp:.3f} CPU-s (best of 5); "
          f"load average {os.getloadavg()[0]:.1f}")


CHILD = r'''
import json, resource, sys, tracemalloc
tracemalloc.start()
from seqgate.verify.run import verify_model
rep = verify_model(sys.argv[1], sys.argv[2], None, recordings=[sys.argv[3]], batch_size=int(sys.argv[4]))
cur, peak = tracemalloc.get_traced_memory()
print(json.dumps({"passed": rep.passed, "maxrss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
                  "traced_peak_mb": peak / 2**20}))
'''


def memory(d: Path, onnx_path: Path, keras_path: Path) -> None:
    rng = np.random.default_rng(1)
    rows = {}
    for mult in (1, 10):
        p = d / f"mem{mult}.npz"
        np.savez(p, x=rng.normal(size=(BATCH * mult, 4 * T, FEATURES)).astype(np.float32))
        cmd = [sys.executable, "-c", CHILD, str(onnx_path), str(keras_path), str(p), str(BATCH)]
        out = subprocess.run(cmd, capture_output=True, text=True, check=True)
        rows[mult] = json.loads(out.stdout.strip().splitlines()[-1])
    a, b = rows[1], rows[10]
    size = BATCH * 4 * T * FEATURES * 4 / 2**20
    print(f"memory (keras, batch {BATCH}, T={4 * T}; recording {size:.0f} MB vs {10 * size:.0f} MB): "
          f"ru_maxrss {a['maxrss_mb']:.0f} -> {b['maxrss_mb']:.0f} MB "
          f"({b['maxrss_mb'] / a['maxrss_mb']:.2f}x); "
          f"tracemalloc peak {a['traced_peak_mb']:.1f} -> {b['traced_peak_mb']:.1f} MB "
          f"({b['traced_peak_mb'] / a['traced_peak_mb']:.2f}x); target: flat")


def main() -> None:
    from seqgate.export.run import export_source

    with tempfile.TemporaryDirectory() as tmp:
        d = Path(tmp)
        x = np.random.default_rng(0).normal(size=(N, T, FEATURES)).astype(np.float32)
        rec = d / "rec.npz"
        np.savez(rec, x=x)
        kpath = make_keras(d)
        export_source(kpath, d / "k.onnx")
        time_ratio("keras", str(kpath), None, d / "k.onnx", rec, x)
        tsrc, tw = make_torch(d)
        export_source(tsrc, d / "t.onnx", weights=str(tw))
        time_ratio("torch", tsrc, str(tw), d / "t.onnx", rec, x)
        memory(d, d / "k.onnx", kpath)


if __name__ == "__main__":
    main()
