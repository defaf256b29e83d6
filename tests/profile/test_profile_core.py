"""Profiler core on small hand-written ONNX graphs: input plans, seeded inputs, the timing loop,
report figures derived from the raw samples, fixed time dims. No assertion on absolute timings."""

from __future__ import annotations

import gc
import json
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from seqgate.errors import BadInputError
from seqgate.profile.inputs import make_inputs, model_axes, plan_inputs
from seqgate.profile.run import profile_model, time_call, timer_overhead

I, H, VOCAB = 3, 4, 50  # noqa: E741 (input and hidden sizes)


def lstm_model(time: str | int = "time", embedding: bool = False, extra_dim: bool = False) -> onnx.ModelProto:
    """[batch, time, I] floats (or [batch, time] token ids → Gather) → LSTM → final state."""
    rng = np.random.default_rng(0)
    inits = [numpy_helper.from_array(rng.normal(0, 0.3, s).astype(np.float32), n)
             for n, s in (("W", (1, 4 * H, I)), ("R", (1, 4 * H, H)), ("B", (1, 8 * H)))]
    nodes = []
    if embedding:
        x = helper.make_tensor_value_info("ids", TensorProto.INT64, ["batch", time])
        inits.append(numpy_helper.from_array(rng.normal(0, 1, (VOCAB, I)).astype(np.float32), "table"))
        nodes += [helper.make_node("Cast", ["ids"], ["ids32"], to=TensorProto.INT32),
                  helper.make_node("Gather", ["table", "ids32"], ["x"])]
    else:
        x = helper.make_tensor_value_info("x", TensorProto.FLOAT, ["batch", time, "feat" if extra_dim else I])
    nodes += [helper.make_node("Transpose", ["x"], ["xt"], perm=[1, 0, 2]),
              helper.make_node("LSTM", ["xt", "W", "R", "B"], ["", "y_h"], hidden_size=H)]
    out = helper.make_tensor_value_info("y_h", TensorProto.FLOAT, [1, "batch", H])
    graph = helper.make_graph(nodes, "g", [x], [out], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])


def save(model: onnx.ModelProto, path: Path) -> Path:
    onnx.save(model, str(path))
    return path


def test_plan_float_and_token_inputs() -> None:
    (p,) = plan_inputs(lstm_model())
    assert (p.name, p.dtype, p.dims, p.vocab) == ("x", "float32", ("batch", "time", I), None)
    (e,) = plan_inputs(lstm_model(embedding=True))
    # the table has 50 rows; the ids reach the Gather through a Cast
    assert (e.dtype, e.dims, e.vocab) == ("int64", ("batch", "time"), VOCAB)


def test_inputs_seeded_in_range_and_order_independent() -> None:
    plans = plan_inputs(lstm_model(embedding=True))
    a = make_inputs(plans, batch=3, t=40, seed=7)["ids"]
    assert a.shape == (3, 40) and a.dtype == np.int64
    assert a.min() >= 0 and a.max() < VOCAB
    assert len(np.unique(a)) > 20  # 120 draws over 50 ids: far from constant
    make_inputs(plans, batch=1, t=5, seed=7)  # another point in between changes nothing
    assert np.array_equal(a, make_inputs(plans, batch=3, t=40, seed=7)["ids"])
    assert not np.array_equal(a, make_inputs(plans, batch=3, t=40, seed=8)["ids"])
    x = make_inputs(plan_inputs(lstm_model()), batch=64, t=64, seed=0)["x"]
    # N(0, 1): 12288 draws, mean within 5 standard errors (5/√12288 ≈ 0.045), std close to 1
    assert x.dtype == np.float32 and abs(float(x.mean())) < 0.05 and abs(float(x.std()) - 1) < 0.05


def test_plan_refuses_unknown_symbolic_dim_and_plain_ints() -> None:
    with pytest.raises(BadInputError, match="axis 2 has the symbolic size 'feat'"):
        plan_inputs(lstm_model(extra_dim=True))
    m = lstm_model()
    m.graph.input.append(helper.make_tensor_value_info("flags", TensorProto.INT64, ["batch", "time"]))
    with pytest.raises(BadInputError, match="input 'flags' is int64 but feeds no embedding table"):
        plan_inputs(m)


def test_axes_fixed_time() -> None:
    m = lstm_model(time=12)
    axes = model_axes(m, plan_inputs(m))
    assert (axes.fixed_time, axes.fixed_batch, axes.has_time) == (12, None, True)


def test_time_call_counts_and_gc() -> None:
    seen: list[bool] = []
    n = time_call(lambda: seen.append(gc.isenabled()), warmup=3, min_runs=7, min_time=0.0)
    assert len(n) == 7 and len(seen) == 10
    assert seen[:3] == [True] * 3 and seen[3:] == [False] * 7  # paused only while timed
    assert gc.isenabled()
    assert all(isinstance(s, int) and s >= 0 for s in n)


def test_time_call_runs_until_min_time_and_reenables_gc_on_error() -> None:
    import time

    t0 = time.perf_counter()
    samples = time_call(lambda: None, warmup=0, min_runs=1, min_time=0.05)
    assert time.perf_counter() - t0 >= 0.05 and len(samples) > 1  # the loop contract, not a speed

    def boom() -> None:
        raise RuntimeError("x")

    with pytest.raises(RuntimeError):
        time_call(boom, warmup=0, min_runs=1, min_time=0.0)
    assert gc.isenabled()


def test_timer_overhead_reported() -> None:
    t = timer_overhead(1000)
    assert t["overhead_min_ns"] <= t["overhead_median_ns"] and t["subtracted"] is False


def test_profile_report_figures(tmp_path: Path) -> None:
    path = save(lstm_model(embedding=True), tmp_path / "m.onnx")
    r = profile_model(path, seq_lens="2,6", batch_sizes="1,3", threads="1", warmup=1, min_runs=5,
                      min_time=0.0, budgets=["6=1000", "4=1000"], percentile=90, seed=3)
    d = json.loads(r.to_json())
    assert d["schema"] == "seqgate.profile/1" and d["seed"] == 3 and d["passed"] is True
    assert d["options"]["seq_lens"] == [2, 4, 6]  # the budget length 4 was added and measured
    assert any("4 added to the sweep" in n for n in d["notes"])
    assert len(d["points"]) == 6 and {p["runtime"] for p in d["points"]} == {"onnxruntime"}
    for p in d["points"]:
        assert p["runs"] >= 5 and p["p50_ms"] <= p["p90_ms"] <= p["p99_ms"] <= p["max_ms"]
        # LSTM I=3 H=4: 4 gates × (4·3 + 4·4) = 112 MACs per step (Gather and Cast count none)
        assert p["macs_per_sequence"] == 112 * p["seq_len"]
        p50_s = p["p50_ms"] / 1e3
        assert p["gflops"] == pytest.approx(2 * 112 * p["seq_len"] * p["batch"] / p50_s / 1e9)
        assert p["sequences_per_s"] == pytest.approx(p["batch"] / p50_s)
        assert p["us_per_step"] == pytest.approx(p["p50_ms"] * 1e3 / p["seq_len"])
    for f in d["fits"]:
        pts = [p for p in d["points"] if p["batch"] == f["batch"]]
        b, a = np.polyfit([p["seq_len"] for p in pts], [p["p90_ms"] for p in pts], 1)
        assert (f["a_ms"], f["b_ms_per_step"]) == pytest.approx((a, b), rel=1e-6, abs=1e-9)
    assert len(d["budgets"]) == 4  # 2 budgets × 2 batches
    for b in d["budgets"]:
        pt = next(p for p in d["points"] if (p["seq_len"], p["batch"]) == (b["seq_len"], b["batch"]))
        assert b["measured_ms"] == pt["p90_ms"] and b["passed"] is (pt["p90_ms"] <= b["budget_ms"])
    env = d["environment"]
    assert env["session_options"] == [{
        "intra_op_num_threads": 1, "inter_op_num_threads": 1, "execution_mode": "ORT_SEQUENTIAL",
        "graph_optimization_level": "ORT_ENABLE_ALL", "providers": ["CPUExecutionProvider"]}]
    assert env["logical_cores"] >= 1 and "onnxruntime" in env["libraries"]
    assert len(d["model"]["sha256"]) == 64


def test_fixed_time_limits_the_sweep(tmp_path: Path) -> None:
    path = save(lstm_model(time=5), tmp_path / "fixed.onnx")
    r = profile_model(path, seq_lens="1,8,32", warmup=0, min_runs=2, min_time=0.0, budgets=["5=1000"])
    assert [p.seq_len for p in r.points] == [5]
    assert "fixes its time dim at 5: the sweep is limited to T=5" in " ".join(r.notes)
    assert r.fits == [] and r.passed
    with pytest.raises(BadInputError, match="the budget at length 8 cannot be checked"):
        profile_model(path, budgets=["8=1"], min_runs=1, min_time=0.0)


def test_python_api_calls_profile_model(tmp_path: Path) -> None:
    import seqgate
    from seqgate.profile.result import ProfileReport

    r = seqgate.profile(save(lstm_model(), tmp_path / "m.onnx"), seq_lens=[3], warmup=0, min_runs=2,
                        min_time=0.0)
    assert isinstance(r, ProfileReport) and [p.seq_len for p in r.points] == [3]
