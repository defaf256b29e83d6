"""The one default of every setting. The command line, the gate config, the Python API and
``fixtures/gate_example.toml`` all take their defaults from here (tests compare them)."""

from __future__ import annotations

# float32 tolerance, |onnx − source| ≤ ATOL + RTOL·|source|.
# Honest float32 noise (measured on this stack): Keras/PyTorch vs onnxruntime max |Δ| ≈ 2e-7
# for an LSTM (I=32, H=128) with realistic weights at T = 10..1000 and ≈ 2e-6 with large random
# weights (FACTS.md); 3.9e-6 for a depth-3 Keras stack at T = 1000; 1.35e-5 for the demo's
# 2-layer bidirectional GRU on 4×-longer synthetic windows; up to 1.6e-4 for a GRU with
# saturating weights at H = 128, T = 1000, where PyTorch itself is 5.7e-5 away from a float64
# reference (float32 sensitivity of the model, not an export error). The earlier 1e-5 failed
# honest exports of that kind. Planted export bugs (swapped gate blocks, wrong GRU reset
# placement, swapped bias halves, a flipped direction, one perturbed recurrent weight) give
# 1e-3..1e0 (FACTS.md: wrong linear_before_reset ≈ 0.3–0.5), at least 10× above this bound and
# mostly 3–4 orders above. The same bound is the project's acceptance rule for an export.
ATOL = 1e-4
RTOL = 1e-4

SEED = 0
# verify
BATCH_SIZE = 64  # windows per runtime call: large enough to amortise a call, small enough for RAM
# Off unless asked: the synthetic sets add five recordings, one of them 4× the recorded length.
SYNTHETIC = False
STATES = True
TASK = "auto"
TASKS = ("auto", "classify", "regress")
ORACLE = False
# streaming files: chunk size streamed besides 1 and 7 (seqgate.verify.streaming)
CHUNK = 16
# streaming files: the long-stream check's length in window lengths (0: off; seqgate.verify.long_stream)
LONG_STREAM_FACTOR = 10
WORKERS = 0  # 0: verify in this process; N: N Ray workers (an embedded local Ray unless CLUSTER)
CLUSTER = ""  # "": no cluster; else the address of a running Ray cluster (HOST:PORT)
# profile
SEQ_LENS = (16, 64, 256)
BATCH_SIZES = (1,)
THREADS = (1,)
WARMUP = 10
MIN_RUNS = 100  # common practice: ≥ 100 samples before quoting a p99
MIN_TIME = 1.0  # seconds per point
PERCENTILE = 99
PERCENTILES = (50, 90, 99)  # the percentiles every profile report carries
COMPARE_SOURCE = True
# streaming files: steps per call timed by profile (one new sample, and a short chunk)
CHUNKS = (1, 16)
# lengths of the rows of a timed batch: "full" (every row T steps), "uniform" (also padded
# batches, lengths uniform in 1..T), or a recording whose lengths/mask are drawn from
LENGTHS = "full"
LENGTH_DRAWS = ("full", "uniform")
# bytes per input element in the memory estimate (float32, the dtype of every sequence input
# the profiler generates except token ids)
BYTES_PER_ELEMENT = 4
