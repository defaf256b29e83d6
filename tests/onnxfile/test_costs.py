"""Cost model (seqgate.costs) against multiply-accumulate counts worked out by hand.

The graphs are written here with onnx.helper (not by seqgate's exporter). Each expected count
is worked from the cell equations, with the arithmetic in a comment:

- LSTM with forget gate (Hochreiter & Schmidhuber 1997; Gers, Schmidhuber & Cummins 2000):
  four gates i, f, o, c̃, each ``W_g x_t + R_g h_{t−1} + b_g``; W_g is H×I, R_g is H×H.
- GRU (Cho et al. 2014): three blocks z, r, h̃ of the same form (the reset gate's product with
  ``R_h h_{t−1}`` is elementwise and not counted).
- Elman RNN (Elman 1990): one block ``h_t = tanh(W x_t + R h_{t−1} + b)``.
- Dense ``y = x A``: a ``[1, K]`` by ``[K, M]`` product is K·M MACs; a 1-D convolution with C_in
  input channels, C_out filters of width k over L output positions is C_out·L·C_in·k MACs.
"""

from __future__ import annotations

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from seqgate.onnxfile.costs import macs_for_length, node_costs, parameter_bytes, summary, time_dim_names

I, H = 3, 2  # noqa: E741 (input and hidden sizes, as in the equations)


def _init(name: str, shape: tuple[int, ...]) -> onnx.TensorProto:
    return numpy_helper.from_array(np.zeros(shape, np.float32), name)


def _recurrent(op: str, gates: int, directions: int = 1, time: str | int = "time",
               head: int | None = None) -> onnx.ModelProto:
    """x [batch, time, I] → Transpose → op → Y_h [D, batch, H] (→ Gemm head of ``head`` units)."""
    direction = "bidirectional" if directions == 2 else "forward"
    nodes = [
        helper.make_node("Transpose", ["x"], ["xt"], perm=[1, 0, 2]),
        helper.make_node(op, ["xt", "W", "R", "B"], ["", "y_h"], hidden_size=H, direction=direction),
    ]
    inits = [_init("W", (directions, gates * H, I)), _init("R", (directions, gates * H, H)),
             _init("B", (directions, 2 * gates * H))]
    out = helper.make_tensor_value_info("y_h", TensorProto.FLOAT, [directions, "batch", H])
    if head is not None:
        nodes += [helper.make_node("Squeeze", ["y_h", "ax"], ["h"]),
                  helper.make_node("Gemm", ["h", "A"], ["y"])]
        inits += [numpy_helper.from_array(np.array([0], np.int64), "ax"), _init("A", (H, head))]
        out = helper.make_tensor_value_info("y", TensorProto.FLOAT, ["batch", head])
    graph = helper.make_graph(nodes, "g", [helper.make_tensor_value_info(
        "x", TensorProto.FLOAT, ["batch", time, I])], [out], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])


@pytest.mark.parametrize(("op", "gates", "expected"), [
    # LSTM: 4 gates × (H·I + H·H) = 4 × (2·3 + 2·2) = 4 × 10 = 40 MACs per step
    ("LSTM", 4, 40),
    # GRU: 3 blocks × (2·3 + 2·2) = 30
    ("GRU", 3, 30),
    # Elman RNN: 1 block × (2·3 + 2·2) = 10
    ("RNN", 1, 10),
])
def test_recurrent_macs_per_step(op: str, gates: int, expected: int) -> None:
    m = _recurrent(op, gates)
    rec = next(c for c in node_costs(m) if c.op_type == op)
    assert (rec.macs_per_step, rec.macs_per_sequence) == (expected, 0)
    # T = 7 steps: 7 × expected
    assert macs_for_length(m, 7) == 7 * expected


def test_bidirectional_lstm_counts_both_directions() -> None:
    # two directions × 40 = 80 per step
    assert summary(_recurrent("LSTM", 4, directions=2))["macs_per_step"] == 80


def test_dense_head_counts_per_sequence() -> None:
    # head on the final state: [1, H] × [H, 5] = 2 · 5 = 10 MACs once per sequence
    s = summary(_recurrent("LSTM", 4, head=5))
    assert (s["macs_per_step"], s["macs_per_sequence"]) == (40, 10)
    # T = 4: 4·40 + 10 = 170
    assert macs_for_length(_recurrent("LSTM", 4, head=5), 4) == 170


def test_parameters_and_bytes() -> None:
    # W 4H·I = 8·3 = 24, R 4H·H = 8·2 = 16, B 2·4H = 16, A H·5 = 10 → 66 floats; the int64
    # axes constant is not a parameter. Bytes: 66·4 + one int64 (8) = 272.
    m = _recurrent("LSTM", 4, head=5)
    s = summary(m)
    assert s["params"] == 66
    assert parameter_bytes(m) == 272


def test_fixed_time_recurrent_split_per_step() -> None:
    # the time dim fixed at 6: 6 steps × 40 = 240 MACs, reported as 40 per step
    m = _recurrent("LSTM", 4, time=6)
    assert summary(m)["macs_per_step"] == 40
    assert macs_for_length(m, 6) == 240


def test_time_dim_found_by_axis_when_not_named_time() -> None:
    m = _recurrent("GRU", 3, time="steps")
    assert time_dim_names(m) == {"steps"}
    assert summary(m)["macs_per_step"] == 30


def test_time_distributed_matmul_and_conv() -> None:
    # MatMul x [1, T, 3] × A [3, 4]: T·3·4 = 12 MACs per step.
    # Conv over y = transpose(x) [1, 3, T] with 4 filters of width 2, no padding: T−1 output
    # positions × 4 filters × 3 channels × 2 taps = 24·(T − 1) → 24 per step, −24 per sequence.
    nodes = [helper.make_node("MatMul", ["x", "A"], ["m"]),
             helper.make_node("Transpose", ["x"], ["xc"], perm=[0, 2, 1]),
             helper.make_node("Conv", ["xc", "K"], ["c"], kernel_shape=[2])]
    graph = helper.make_graph(
        nodes, "g", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["batch", "time", 3])],
        [helper.make_tensor_value_info("m", TensorProto.FLOAT, ["batch", "time", 4]),
         helper.make_tensor_value_info("c", TensorProto.FLOAT, ["batch", 4, None])],
        [_init("A", (3, 4)), _init("K", (4, 3, 2))])
    m = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    costs = {c.op_type: c for c in node_costs(m)}
    assert (costs["MatMul"].macs_per_step, costs["MatMul"].macs_per_sequence) == (12, 0)
    assert (costs["Conv"].macs_per_step, costs["Conv"].macs_per_sequence) == (24, -24)
    # T = 10: 12·10 + 24·9 = 120 + 216 = 336
    assert macs_for_length(m, 10) == 336
