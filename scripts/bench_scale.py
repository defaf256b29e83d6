"""Benchmark: verify on Ray — windows/s with 1 and 2 workers on this machine, and the merge cost.

Model and data: the ``bench verify`` PyTorch model (2 stacked LSTMs, 32 features, H=128, T=100),
a recording of ``WINDOWS`` windows, batch 64. For each worker count the embedded local Ray
(loopback only, ``seqgate.verify.cluster``) is started, and ``verify_model(..., workers=N)``
runs end to end. Figures:

- steady windows/s: the sum over workers of each worker's windows / busy seconds (what the
  ranges themselves took, Ray and model start-up excluded) — the figure that scales;
- end-to-end windows/s: windows / wall time of ``verify_model``, Ray start-up, worker start-up
  (each loads PyTorch, the model and an ONNX Runtime session) and the driver's own checks included;
- in process: ``verify_model`` without Ray, for reference;
- merge: seconds spent merging the ranges' statistics (from the report), and that time per range.

Also prints the recording's read bandwidth from disk (page cache: an upper bound), which
bounds the scaling in README's "Verifying on a Ray cluster". Run with ``scripts/bench scale``.
"""

from __future__ import annotations

import os
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "3")
sys.path.insert(0, str(Path(__file__).resolve().parent))

WINDOWS, BATCH = 4096, 64


def main() -> None:
    import bench_verify as bv  # the same model as `scripts/bench verify`

    from seqgate.export.run import export_source
    from seqgate.verify.run import verify_model

    with tempfile.TemporaryDirectory() as tmp:
        d = Path(tmp)
        src, w = bv.make_torch(d)
        export_source(src, d / "t.onnx", weights=str(w))
        rec = d / "rec.npy"
        np.save(rec, np.random.default_rng(0).normal(size=(WINDOWS, bv.T, bv.FEATURES)).astype(np.float32))
        t0 = time.perf_counter()
        np.load(rec, mmap_mode="r").sum()
        read = rec.stat().st_size / (time.perf_counter() - t0) / 2**20
        t0 = time.perf_counter()
        base = verify_model(d / "t.onnx", src, str(w), recordings=[rec], batch_size=BATCH)
        inproc = WINDOWS / (time.perf_counter() - t0)
        print(f"in process: {inproc:.0f} windows/s end to end ({WINDOWS} windows x {bv.T} steps); "
              f"recording read {read:.0f} MB/s ({rec.stat().st_size / WINDOWS / 1024:.1f} KB per window)")
        for n in (1, 2):
            t0 = time.perf_counter()
            rep = verify_model(d / "t.onnx", src, str(w), recordings=[rec], batch_size=BATCH, workers=n)
            wall = time.perf_counter() - t0
            assert rep.passed == base.passed and rep.first_divergence == base.first_divergence
            info = rep.workers or {}
            steady = sum(x["windows_per_s"] for x in info.get("per_worker", []))
            per = ", ".join(f"{x['windows_per_s']:.0f}" for x in info.get("per_worker", []))
            label = f"{n} worker{'s' if n > 1 else ''}"
            print(f"{label}: steady {steady:.0f} windows/s (per worker {per}); end to end "
                  f"{WINDOWS / wall:.0f} windows/s ({wall:.1f} s incl. Ray and worker start-up); "
                  f"merge {info.get('merge_seconds', 0) * 1e3:.1f} ms for {info.get('ranges')} ranges "
                  f"({info.get('merge_seconds', 0) * 1e3 / max(info.get('ranges', 1), 1):.2f} ms per range)")
        print(f"load average now: {os.getloadavg()[0]:.2f} (2 cores shared with other work)")


if __name__ == "__main__":
    main()
