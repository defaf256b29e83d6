"""Reduced-precision deployment variants of an exported model, verified and timed side by side.

Owns: making variants with ``onnxruntime.quantization`` (dynamic INT8 weights, static INT8
calibrated on the user's recorded windows, float16) and the exact scan form of GRU/RNN nodes that
lets their weights be quantized (``make``, ``scanform``); the per-node account of what was
quantized; verifying a variant against the source framework under its own acceptance rule, with
task-level figures (top-1 agreement, label flips, forecast error against recorded targets,
per-step hidden-state drift) (``check``); and the gate's variant step (``step``): make, verify,
time in the same profile sweep as float32, keep the accepted files and mark the fastest.
"""
