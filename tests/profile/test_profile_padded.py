"""Profile of padded batches (``--lengths`` / ``[profile] lengths``) on small hand-written ONNX
graphs: the lengths fed are the ones the stated rule draws (recomputed here with numpy's own
generator), the padded steps hold the padding, the points are labelled, budgets judge only the
full-length batches. The feeds are captured where ONNX Runtime receives them."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from typer.testing import CliRunner

from seqgate.cli.app import app
from seqgate.errors import EXIT_BAD_INPUT, BadInputError
from seqgate.profile.inputs import draw_lengths, make_inputs, pad_batch, plan_inputs
from seqgate.profile.run import profile_model
from seqgate.settings import CLI, Problems, parse_settings

I, H, VOCAB = 2, 3, 12  # noqa: E741 (input and hidden sizes)
LENGTHS_ENTRY = {"kind": "lengths", "lengths": "lengths", "inputs": ["x"], "patterns": ["right"],
                 "min_length": 1}
VALUE_ENTRY = {"kind": "value", "input": "ids", "value": 0, "patterns": ["right", "left", "holes"],
               "min_length": 0}
FAST = {"warmup": 0, "min_runs": 2, "min_time": 0.0}


def packed_model(padding: bool = True) -> onnx.ModelProto:
    """x [batch, time, I], lengths [batch] int64 → LSTM with sequence_lens → final state [batch, H]."""
    rng = np.random.default_rng(1)
    inits = [numpy_helper.from_array(rng.normal(0, 0.4, s).astype(np.float32), n)
             for n, s in (("W", (1, 4 * H, I)), ("R", (1, 4 * H, H)))]
    inits.append(numpy_helper.from_array(np.array([0], np.int64), "axis0"))
    nodes = [helper.make_node("Transpose", ["x"], ["xt"], perm=[1, 0, 2]),
             helper.make_node("Cast", ["lengths"], ["len32"], to=TensorProto.INT32),
             helper.make_node("LSTM", ["xt", "W", "R", "", "len32"], ["", "y_h"], hidden_size=H),
             helper.make_node("Squeeze", ["y_h", "axis0"], ["y"])]
    inputs = [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["batch", "time", I]),
              helper.make_tensor_value_info("lengths", TensorProto.INT64, ["batch"])]
    out = helper.make_tensor_value_info("y", TensorProto.FLOAT, ["batch", H])
    model = helper.make_model(helper.make_graph(nodes, "g", inputs, [out], inits),
                              opset_imports=[helper.make_opsetid("", 17)])
    if padding:
        helper.set_model_props(model, {"seqgate.padding": json.dumps([LENGTHS_ENTRY])})
    return model


def token_model() -> onnx.ModelProto:
    """ids [batch, time] (0 = padding) → Gather(table) → mean over time: a masked-input graph."""
    table = np.random.default_rng(2).normal(size=(VOCAB, 4)).astype(np.float32)
    nodes = [helper.make_node("Gather", ["table", "ids"], ["e"]),
             helper.make_node("ReduceMean", ["e"], ["y"], axes=[1], keepdims=0)]
    ids = helper.make_tensor_value_info("ids", TensorProto.INT64, ["batch", "time"])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, ["batch", 4])
    graph = helper.make_graph(nodes, "g", [ids], [y], [numpy_helper.from_array(table, "table")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    helper.set_model_props(model, {"seqgate.padding": json.dumps([VALUE_ENTRY])})
    return model


def save(model: onnx.ModelProto, path: Path) -> Path:
    onnx.save(model, str(path))
    return path


@pytest.fixture
def fed(monkeypatch: pytest.MonkeyPatch) -> list[dict[str, np.ndarray[Any, Any]]]:
    """Every feed dict ONNX Runtime is timed on, in order."""
    from seqgate.runtimes.onnx import OnnxRunner

    seen: list[dict[str, np.ndarray[Any, Any]]] = []
    original = OnnxRunner.timed_call

    def spy(self: Any, feeds: dict[str, Any], threads: int = 0) -> Any:
        seen.append({k: np.array(v) for k, v in feeds.items()})
        return original(self, feeds, threads)

    monkeypatch.setattr(OnnxRunner, "timed_call", spy)
    return seen


def test_uniform_lengths_are_drawn_as_stated_and_points_labelled(tmp_path: Path, fed: list[Any]) -> None:
    path = save(packed_model(), tmp_path / "m.onnx")
    seed, batch = 5, 6
    rep = profile_model(path, seq_lens=[7, 30], batch_sizes=[batch], lengths="uniform", seed=seed,
                        budgets=["7=10000"], **FAST).to_dict()
    assert rep["options"]["lengths"] == "uniform"
    points = rep["points"]
    assert [(p["seq_len"], p["lengths"], p["padded"]) for p in points] == [
        (7, "full", False), (7, "uniform", True), (30, "full", False), (30, "uniform", True)]
    assert len(fed) == 4
    for p, feeds in zip(points, fed, strict=True):
        t = p["seq_len"]
        if not p["padded"]:
            assert (feeds["lengths"] == t).all() and p["valid_steps"] == batch * t
            continue
        # the stated rule, recomputed with numpy: default_rng([seed, T, batch, 1]).integers(1, T + 1)
        want = np.random.default_rng([seed, t, batch, 1]).integers(1, t + 1, size=batch)
        np.testing.assert_array_equal(feeds["lengths"], want)
        assert p["valid_steps"] == int(want.sum())
        full = fed[points.index(p) - 1]["x"]  # the full-length batch measured just before
        steps = np.arange(t)[None, :, None]
        np.testing.assert_array_equal(feeds["x"], np.where(steps < want[:, None, None], full, 0.0))
    # one budget, judged on the full-length point only
    (b,) = rep["budgets"]
    assert b["measured_ms"] == points[0][f"p{rep['options']['percentile']}_ms"]
    assert {f["lengths"] for f in rep["fits"]} <= {"full", "uniform"}


def test_lengths_from_a_recording(tmp_path: Path, fed: list[Any]) -> None:
    path = save(packed_model(), tmp_path / "m.onnx")
    recorded = np.array([3, 9, 9, 14, 20, 1], np.int64)  # some longer than T = 10: cut to 10
    rec = tmp_path / "rec.npz"
    np.savez(rec, x=np.zeros((6, 20, I), np.float32), lengths=recorded)
    rep = profile_model(path, seq_lens=[10], batch_sizes=[8], lengths=str(rec), seed=3, **FAST).to_dict()
    padded = [p for p in rep["points"] if p["padded"]]
    assert [p["lengths"] for p in padded] == ["recording"]
    # numpy: choice over the recorded lengths with the point's generator, clipped to 1..T
    want = np.clip(np.random.default_rng([3, 10, 8, 1]).choice(recorded, size=8), 1, 10)
    np.testing.assert_array_equal(fed[1]["lengths"], want)
    assert set(want) <= {1, 3, 9, 10}
    assert any("mean 9.3 valid steps" in n for n in rep["notes"])  # (3+9+9+14+20+1)/6 = 9.33


def test_token_ids_never_hold_the_padding_id_and_padded_tail_does() -> None:
    plans = plan_inputs(token_model())
    (p,) = plans
    assert p.vocab == VOCAB and p.pad_value == 0
    ids = make_inputs(plans, batch=64, t=50, seed=0)["ids"]
    assert ids.min() >= 1 and ids.max() == VOCAB - 1
    assert set(np.unique(ids)) == set(range(1, VOCAB))  # 3200 draws cover all 11 ids
    lengths = draw_lengths(None, 64, 50, seed=0)
    padded = pad_batch(plans, {"ids": ids}, lengths)["ids"]
    # hand rule: a step is padding iff it is at or past the row's length
    assert ((padded == 0) == (np.arange(50)[None] >= lengths[:, None])).all()
    assert ((padded != 0).sum(axis=1) == lengths).all()


def test_token_model_profiles_with_uniform_lengths(tmp_path: Path, fed: list[Any]) -> None:
    rep = profile_model(save(token_model(), tmp_path / "t.onnx"), seq_lens=[12], batch_sizes=[4],
                        lengths="uniform", seed=9, **FAST).to_dict()
    want = np.random.default_rng([9, 12, 4, 1]).integers(1, 13, size=4)
    np.testing.assert_array_equal((fed[1]["ids"] != 0).sum(axis=1), want)
    assert (fed[0]["ids"] != 0).all()
    assert rep["points"][1]["valid_steps"] == int(want.sum())


def test_padded_profile_needs_a_model_that_pads(tmp_path: Path) -> None:
    path = save(packed_model(padding=False), tmp_path / "m.onnx")
    with pytest.raises(BadInputError, match="feeds no embedding table"):  # no padding record: a plain int
        profile_model(path, seq_lens=[4], lengths="uniform", **FAST)
    tokens = token_model()
    del tokens.metadata_props[:]
    with pytest.raises(BadInputError, match="the model takes no lengths and no mask"):
        profile_model(save(tokens, tmp_path / "t.onnx"), seq_lens=[4], lengths="uniform", **FAST)


def test_lengths_setting_parses_in_every_place() -> None:
    for value, want in (("full", "full"), ("uniform", "uniform"), ("logs.npz", Path("logs.npz"))):
        problems = Problems()
        assert parse_settings("profile", {"lengths": value}, CLI, problems)["lengths"] == want
        assert not problems.items
    problems = Problems()
    parse_settings("profile", {"lengths": "unifrom"}, CLI, problems)
    assert problems.items and problems.items[0].startswith("--lengths 'unifrom' (did you mean 'uniform'?)")


def test_cli_lengths_labels_csv_rows(tmp_path: Path) -> None:
    path = save(packed_model(), tmp_path / "m.onnx")
    out = tmp_path / "p.csv"
    r = CliRunner().invoke(app, ["profile", str(path), "--seq-lens", "6", "--min-runs", "2", "--min-time", "0",
                                 "--warmup", "0", "--lengths", "uniform", "--csv", str(out), "--quiet"])
    assert r.exit_code == 0, r.output
    rows = list(csv.DictReader(io.StringIO(out.read_text())))
    assert [(row["lengths"], row["seq_len"]) for row in rows] == [("full", "6"), ("uniform", "6")]
    assert "6 padded (uniform" in r.output
    bad = CliRunner().invoke(app, ["profile", str(path), "--lengths", "sometimes"])
    assert bad.exit_code == EXIT_BAD_INPUT and "--lengths 'sometimes'" in bad.output
