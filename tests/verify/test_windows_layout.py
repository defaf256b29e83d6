"""Recordings are window-first whatever the model's input layout; synthetic sets keep full shapes.

Expected shapes below are worked out by hand from the layouts named in each test.
"""

from __future__ import annotations

import numpy as np
import onnx
from onnx import TensorProto, helper

from seqgate.verify.recordings import input_specs, to_model_layout
from seqgate.verify.synthetic import synthetic_sets


def _model(inputs: list[tuple[str, int, list[object]]]) -> onnx.ModelProto:
    vis = [helper.make_tensor_value_info(n, t, d) for n, t, d in inputs]
    out = helper.make_tensor_value_info("y", TensorProto.FLOAT, None)
    node = helper.make_node("Identity", [inputs[0][0]], ["y"])
    return helper.make_model(helper.make_graph([node], "g", vis, [out]))


def test_initial_state_input_is_recorded_windows_first() -> None:
    # PyTorch h0 is [L·D, batch, H] = [2, batch, 5]; a recording holds it as [windows, 2, 5].
    specs = input_specs(_model([("x", TensorProto.FLOAT, ["batch", "time", 3]),
                                ("h0", TensorProto.FLOAT, [2, "batch", 5])]))
    h0 = {s.name: s for s in specs}["h0"]
    assert h0.batch_axis == 1 and h0.window_dims == ("batch", 2, 5) and not h0.is_sequence
    rec = np.arange(7 * 2 * 5, dtype=np.float32).reshape(7, 2, 5)
    fed = to_model_layout({"h0": rec}, specs)["h0"]
    assert fed.shape == (2, 7, 5)
    assert np.array_equal(fed[:, 3, :], rec[3])  # window 3 lands in batch column 3


def test_time_major_input_is_recorded_windows_first() -> None:
    (x,) = input_specs(_model([("x", TensorProto.FLOAT, ["time", "batch", 4])]))
    assert x.window_dims == ("batch", "time", 4) and x.is_sequence and x.time_dynamic
    rec = np.random.default_rng(0).normal(size=(6, 9, 4)).astype(np.float32)
    assert x.to_model(rec).shape == (9, 6, 4)


def test_synthetic_sets_have_full_shapes() -> None:
    specs = input_specs(_model([("x", TensorProto.FLOAT, ["batch", 12, 3])]))
    sets = {r.label: r for r in synthetic_sets(specs, None, seed=5, windows=8)}
    assert "synthetic:long" not in sets  # the time axis is fixed at 12
    for r in sets.values():
        assert r.arrays["x"].shape == (8, 12, 3), r.label
    const = sets["synthetic:constants"].arrays["x"].read(0, 8)
    assert np.all(const == const[:, :1, :])  # each window holds one value per feature at every step


def test_token_ids_get_a_long_set_and_stay_in_range() -> None:
    specs = input_specs(_model([("tokens", TensorProto.INT64, ["batch", "time"])]))
    (tok,) = specs
    assert tok.is_sequence and tok.time_dynamic
    sets = {r.label: r for r in synthetic_sets(specs, None, seed=1, windows=4)}
    assert {"synthetic:constants", "synthetic:long"} <= set(sets)
    long = sets["synthetic:long"].arrays["tokens"]
    assert long.shape[1] == 4 * sets["synthetic:scaled"].arrays["tokens"].shape[1]
    for r in sets.values():
        ids = r.arrays["tokens"].read(0, 4)
        assert ids.dtype == np.int64 and ids.min() >= 0
