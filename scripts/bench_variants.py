"""Benchmark: reduced-precision variants against float32 ONNX Runtime and PyTorch eager.

Models: a 2-layer LSTM and a 2-layer GRU (input 64 features, H = 256, a Linear head on the last
step, seeded weights), exported by seqgate; and the same LSTM at H = 512, whose float32 recurrent
weights (4 MiB per layer) no longer fit a core's L2 cache on this machine while the INT8 ones do.
Points: T = 128, batch 1 and 64, one thread everywhere (ONNX Runtime ``intra_op_num_threads = 1``,
``torch.set_num_threads(1)``).

Runtimes per model: PyTorch eager (``torch.inference_mode``), float32 ONNX Runtime and every
variant ``seqgate.variants.make`` makes (int8_dynamic, int8_dynamic_scan for the GRU,
int8_static calibrated on random windows, float16). All run interleaved: in each round every
runtime runs ``RUNS`` times back to back, in an order that rotates between rounds; a round's
figure is each runtime's median, and a speed-up is the median over rounds of the per-round ratio
(paired, so slow spells of a shared machine fall on both sides). max |Δ| is against PyTorch on
the timed inputs.

Target (issue 14; a benchmark, not a test): the INT8 LSTM at H ≥ 256 is ≥ 2.5× faster than
float32 ONNX Runtime and faster than PyTorch eager at batch 1 and at batch 64; checked at every
H measured. Exit 1 when not.
"""

from __future__ import annotations

import os
import statistics
import sys
import time
from typing import Any

os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "3")

FEATURES, T, LAYERS = 64, 128, 2
MODELS = (("lstm", 256), ("gru", 256), ("lstm", 512))
BATCHES = (1, 64)
ROUNDS = {1: 15, 64: 7}
RUNS = {1: 20, 64: 3}
TARGET = 2.5


def _module(kind: str, H: int) -> Any:
    import numpy as np
    import torch
    from torch import nn

    class Net(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.rnn = (nn.LSTM if kind == "lstm" else nn.GRU)(FEATURES, H, num_layers=LAYERS, batch_first=True)
            self.head = nn.Linear(H, 8)

        def forward(self, x: torch.Tensor) -> torch.Tensor:
            y, _ = self.rnn(x)
            return self.head(y[:, -1])

    net = Net()
    rng = np.random.default_rng(7)
    with torch.no_grad():
        for p in net.parameters():  # ±1/sqrt(H), PyTorch's own initial range, seeded here
            p.copy_(torch.from_numpy(rng.uniform(-H ** -0.5, H ** -0.5, tuple(p.shape)).astype(np.float32)))
    return net.eval()


def _session(model: Any) -> Any:
    import onnxruntime as ort

    from seqgate.runtimes.onnx import session_options

    so, _ = session_options(1, timing=True)
    return ort.InferenceSession(model.SerializeToString(), so, providers=["CPUExecutionProvider"])


def _runtimes(kind: str, H: int) -> tuple[dict[str, Any], Any]:
    """{label: zero-argument-of-feeds call} for one model, and the PyTorch module."""
    import numpy as np
    import torch

    from seqgate.export.torch.capture import export_torch_module
    from seqgate.variants.make import make_variant
    from seqgate.verify.recordings import MappedArray, Recording, input_specs

    net = _module(kind, H)
    model = export_torch_module(net, 17, {"seqgate.version": "bench"}, inputs=[f"x:batch,time,{FEATURES}"])
    specs = input_specs(model)
    calib = np.random.default_rng(1).standard_normal((64, T, FEATURES)).astype(np.float32)
    recs = [Recording("calibration", "recorded", {"x": MappedArray(calib, "x")}, 64)]
    calls: dict[str, Any] = {}

    def torch_call(x: Any) -> Any:
        with torch.inference_mode():
            return net(torch.from_numpy(x)).numpy()

    calls["pytorch eager"] = torch_call
    sessions = {"float32": _session(model)}
    for v in ("int8_dynamic", "int8_dynamic_scan", "int8_static", "float16"):
        made = make_variant(model, v, recs, specs)
        if made.made:
            sessions[v] = _session(made.model)
    for label, s in sessions.items():
        calls[label] = (lambda sess: lambda x: sess.run(None, {"x": x})[0])(s)
    return calls, net


def _measure(calls: dict[str, Any], x: Any, batch: int) -> dict[str, list[float]]:
    """Per runtime, the median ms of each round (module docstring)."""
    import gc

    labels = list(calls)
    for f in calls.values():
        f(x)
    rounds: dict[str, list[float]] = {k: [] for k in labels}
    gc.disable()
    try:
        for r in range(ROUNDS[batch]):
            for label in labels[r % len(labels):] + labels[: r % len(labels)]:
                ts = []
                for _ in range(RUNS[batch]):
                    t0 = time.perf_counter()
                    calls[label](x)
                    ts.append(time.perf_counter() - t0)
                rounds[label].append(statistics.median(ts) * 1e3)
    finally:
        gc.enable()
    return rounds


def _ratio(a: list[float], b: list[float]) -> float:
    return statistics.median(x / y for x, y in zip(a, b, strict=True))


def main() -> int:
    import numpy as np
    import torch

    torch.set_num_threads(1)
    print(f"T={T}, input {FEATURES}, {LAYERS} layers, one thread; speed-up = median over rounds of the "
          f"per-round ratio of medians")
    header = (f"{'model':5} {'H':>4} {'batch':>5}  {'runtime':18} {'p50 ms':>9} {'× float32':>10} "
              f"{'× pytorch':>10} {'max |Δ|':>9}")
    print(header)
    print("-" * len(header))
    ok = True
    for kind, H in MODELS:
        calls, _ = _runtimes(kind, H)
        for batch in BATCHES:
            x = np.random.default_rng(batch).standard_normal((batch, T, FEATURES)).astype(np.float32)
            ref = calls["pytorch eager"](x)
            rounds = _measure(calls, x, batch)
            for label, ms in rounds.items():
                vs32 = _ratio(rounds["float32"], ms)
                vspt = _ratio(rounds["pytorch eager"], ms)
                err = float(np.abs(np.asarray(calls[label](x), np.float64) - ref).max())
                print(f"{kind:5} {H:>4} {batch:>5}  {label:18} {statistics.median(ms):9.3f} {vs32:10.2f} "
                      f"{vspt:10.2f} {err:9.2e}")
                if kind == "lstm" and label == "int8_dynamic":
                    ok &= vs32 >= TARGET and vspt > 1.0
    print(f"target: LSTM int8_dynamic ≥ {TARGET}× float32 and > 1× PyTorch at every H, batch 1 and 64: "
          f"{'met' if ok else 'NOT met'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
