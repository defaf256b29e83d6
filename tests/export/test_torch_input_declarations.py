"""``--input NAME:DIMS[:DTYPE][=LOW..HIGH]``: dtypes, value ranges, dims as expressions, and the
exit code of a failed run on a guessed shape.

Every export is checked against PyTorch itself: ONNX Runtime and the module run on the same
arrays, built here with NumPy (two independent computations). ONNX element types are checked
against the onnx spec's ``TensorProto.DataType`` enum (onnx/onnx.proto: FLOAT = 1, INT32 = 6,
INT64 = 7, BOOL = 9).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import onnx
import pytest
import torch
from torch import nn

from seqgate.errors import BadInputError, UnsupportedModelError
from seqgate.export.torch.declared import Declared, parse_inputs, parse_one
from seqgate.export.torch.inputs import InputSpec
from seqgate.export.torch.samples import symbol_values
from seqgate.onnxfile.input_meta import read_ranges
from seqgate.profile.inputs import make_inputs, plan_inputs
from seqgate.verify.recordings import input_specs, load_recording
from seqgate.verify.synthetic import synthetic_sets
from torch_models import export, rand, randomize, run_onnx, torch_outputs, worst

torch.set_num_threads(1)

# onnx/onnx.proto, message TensorProto, enum DataType (the values are part of the file format)
SPEC_FLOAT, SPEC_INT32, SPEC_INT64, SPEC_BOOL = 1, 6, 7, 9


def _elem_types(model: Any) -> dict[str, int]:
    return {i.name: i.type.tensor_type.elem_type for i in model.graph.input}


def _dims(vi: Any) -> list[int | str]:
    return [d.dim_param or d.dim_value for d in vi.type.tensor_type.shape.dim]


def test_spec_enum_values_are_the_ones_onnx_defines() -> None:
    # the literals above are the onnx.proto numbers; the installed onnx must agree with them
    assert (onnx.TensorProto.FLOAT, onnx.TensorProto.INT32, onnx.TensorProto.INT64,
            onnx.TensorProto.BOOL) == (SPEC_FLOAT, SPEC_INT32, SPEC_INT64, SPEC_BOOL)


# ----- parsing ------------------------------------------------------------------------------------
@pytest.mark.parametrize(("text", "want"), [
    ("x:batch,time,8", Declared("x", ("batch", "time", 8))),
    ("lengths:batch:int64=1..time", Declared("lengths", ("batch",), "int64", 1, "time")),
    ("lengths:batch=1..time-1", Declared("lengths", ("batch",), "int64", 1, "time-1")),
    ("cats:batch,time:int32=0..11", Declared("cats", ("batch", "time"), "int32", 0, 11)),
    ("mask:batch,time:bool", Declared("mask", ("batch", "time"), "bool", 0, 1)),
    ("dec:batch,time+6,2", Declared("dec", ("batch", "time+6", 2))),
    ("dec:batch, time - 1 ,2", Declared("dec", ("batch", "time-1", 2))),
    ("batch.encoder_cont:batch,24,3", Declared("batch.encoder_cont", ("batch", 24, 3))),
    ("scale:", Declared("scale", ())),
    ("x:batch,time,3:float32", Declared("x", ("batch", "time", 3), "float32")),
])
def test_accepted_forms(text: str, want: Declared) -> None:
    assert parse_one(text) == want


@pytest.mark.parametrize(("texts", "needle"), [
    (["x"], "expected NAME:DIM"),
    (["x:batch:float64"], "dtype 'float64' is not one of"),
    (["x:batch,time,3:float32=0..1"], "a value range is for integer inputs"),
    (["n:batch:int64=5..2"], "is empty"),
    (["n:batch:int64=1.."], "should read LOW..HIGH"),
    (["n:batch:int64=1-time"], "should read LOW..HIGH"),
    (["n:batch:int64=a b..3"], "neither an integer nor a symbolic dim"),
    (["x:batch,time*2,3"], "neither a positive integer"),
    (["x:batch,0,3"], "neither a positive integer"),
    (["x:batch:int64:extra"], "expected NAME:DIM"),
    (["batch.a.b:batch,3"], "expected NAME:DIM"),
    (["2x:batch,3"], "expected NAME:DIM"),
    (["n:batch=1..horizon"], "names no dim of any input"),
    (["x:batch,3", "x:batch,4"], "names 'x' twice"),
    (["batch:batch,3", "batch.a:batch,4"], "not both"),
])
def test_bad_syntax_is_one_paragraph_exit_2(texts: list[str], needle: str) -> None:
    with pytest.raises(BadInputError) as e:
        parse_inputs(texts)
    msg = str(e.value)
    assert e.value.exit_code == 2 and needle in msg, msg
    assert "\n" not in msg, msg  # one paragraph


def test_range_bound_may_name_a_dim_another_input_declares() -> None:
    got = parse_inputs(["x:batch,steps,3", "n:batch=1..steps"])
    assert got["n"].high == "steps"


# ----- integer inputs -----------------------------------------------------------------------------
class LengthScaled(nn.Module):
    """Lengths used as numbers (no packing): the last state scaled by length / T."""

    def __init__(self) -> None:
        super().__init__()
        self.gru = nn.GRU(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor, lengths: torch.Tensor) -> torch.Tensor:
        _, h = self.gru(x)
        return h[0] * (lengths.unsqueeze(-1).float() / x.size(1))


class Categories(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.emb = nn.Embedding(12, 3)
        self.gru = nn.GRU(5, 4, batch_first=True)

    def forward(self, x: torch.Tensor, cats: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
        feats = torch.cat([x, self.emb(cats)], -1) * mask.unsqueeze(-1).float()
        return self.gru(feats)[0]


class Packed(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor, lengths: torch.Tensor) -> torch.Tensor:
        p = nn.utils.rnn.pack_padded_sequence(x, lengths, batch_first=True, enforce_sorted=False)
        _, (h, _) = self.lstm(p)
        return h[0]


@pytest.mark.parametrize(("dtype", "spec_type"), [("int64", SPEC_INT64), ("int32", SPEC_INT32)])
def test_lengths_input_gets_its_dtype_and_matches_pytorch(dtype: str, spec_type: int,
                                                          rng: np.random.Generator) -> None:
    m = randomize(LengthScaled())
    model = export(m, ["x:batch,time,3", f"lengths:batch:{dtype}=1..time"])
    assert _elem_types(model) == {"x": SPEC_FLOAT, "lengths": spec_type}
    assert read_ranges(model) == {"lengths": {"low": 1, "high": "time"}}
    feeds = {"x": rand(rng, 5, 9, 3), "lengths": rng.integers(1, 10, size=5).astype(dtype)}
    worst(torch_outputs(m, feeds), run_onnx(model, feeds))


def test_category_ids_and_bool_mask(rng: np.random.Generator) -> None:
    m = randomize(Categories())
    model = export(m, ["x:batch,time,2", "cats:batch,time:int64=0..11", "mask:batch,time:bool"])
    assert _elem_types(model) == {"x": SPEC_FLOAT, "cats": SPEC_INT64, "mask": SPEC_BOOL}
    feeds = {"x": rand(rng, 4, 7, 2), "cats": rng.integers(0, 12, size=(4, 7)).astype(np.int64),
             "mask": rng.random((4, 7)) < 0.7}
    worst(torch_outputs(m, feeds), run_onnx(model, feeds))


def test_float_ids_failure_hints_at_declaring_the_dtype() -> None:
    # PyTorch's own refusal of float indices in an Embedding, mapped to a hint naming --input's dtype
    from seqgate.export.torch.untraceable import untraceable

    emb = nn.Embedding(5, 2)
    with pytest.raises(RuntimeError) as e:
        emb(torch.zeros(3))
    why = untraceable(emb, e.value)
    assert "declare its dtype and value range, --input NAME:DIM,...:int64=0..N-1" in why.line()


def test_packing_lengths_declared_int32(rng: np.random.Generator) -> None:
    m = randomize(Packed())
    model = export(m, ["lengths:batch:int32=1..time"])
    assert _elem_types(model)["lengths"] == SPEC_INT32
    feeds = {"x": rand(rng, 4, 6, 3), "lengths": np.array([6, 1, 3, 5], dtype=np.int32)}
    worst(torch_outputs(m, feeds), run_onnx(model, feeds))


def test_synthetic_lengths_stay_within_each_window() -> None:
    model = export(randomize(LengthScaled()), ["x:batch,time,3", "lengths:batch:int32=1..time"])
    sets = synthetic_sets(input_specs(model), None, seed=3, ranges=read_ranges(model))
    assert {r.kind for r in sets} >= {"synthetic:scaled", "synthetic:long"}
    for r in sets:
        lengths, steps = r.arrays["lengths"].array, r.arrays["x"].shape[1]
        assert lengths.dtype == np.int32, r.kind
        assert lengths.min() >= 1 and lengths.max() <= steps, (r.kind, lengths, steps)
    long = next(r for r in sets if r.kind == "synthetic:long")
    # uniform in 1..64: 32 draws all at most 16 has probability (1/4)^32
    assert long.arrays["x"].shape[1] == 64 and long.arrays["lengths"].array.max() > 16


def test_synthetic_ids_cover_the_declared_range() -> None:
    model = export(randomize(Categories()), ["x:batch,time,2", "cats:batch,time:int64=0..11",
                                             "mask:batch,time:bool"])
    sets = {r.kind: r for r in synthetic_sets(input_specs(model), None, seed=0, ranges=read_ranges(model))}
    ids = sets["synthetic:scaled"].arrays["cats"].array
    # 512 uniform draws over 12 ids: missing one of them has probability below 12·(11/12)^512
    assert ids.dtype == np.int64 and set(np.unique(ids)) == set(range(12))
    assert sets["synthetic:extremes"].arrays["cats"].array.max() == 11
    mask = sets["synthetic:scaled"].arrays["mask"].array
    assert mask.dtype == np.bool_ and mask.any() and not mask.all()


def test_recorded_integer_arrays_keep_their_dtype(tmp_path: Path, rng: np.random.Generator) -> None:
    model = export(randomize(LengthScaled()), ["x:batch,time,3", "lengths:batch:int64=1..time"])
    path = tmp_path / "rec.npz"
    np.savez(path, x=rand(rng, 6, 5, 3), lengths=np.array([1, 2, 3, 4, 5, 5], dtype=np.int64))
    rec = load_recording(path, input_specs(model))
    assert rec.arrays["lengths"].dtype == np.int64
    np.savez(path, x=rand(rng, 6, 5, 3), lengths=np.ones(6, dtype=np.float32))
    with pytest.raises(BadInputError, match="dtype float32, the model expects int64"):
        load_recording(path, input_specs(model))


def test_profiler_draws_declared_ranges() -> None:
    model = export(randomize(LengthScaled()), ["x:batch,time,3", "lengths:batch:int32=1..time"])
    feeds = make_inputs(plan_inputs(model), batch=64, t=10, seed=0)
    assert feeds["lengths"].dtype == np.int32
    assert feeds["lengths"].min() >= 1 and feeds["lengths"].max() <= 10


# ----- dims as expressions ------------------------------------------------------------------------
class EncoderDecoder(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.enc = nn.GRU(3, 4, batch_first=True)
        self.dec = nn.GRU(2, 4, batch_first=True)

    def forward(self, enc: torch.Tensor, dec: torch.Tensor) -> torch.Tensor:
        _, h = self.enc(enc)
        return self.dec(dec, h)[0]


@pytest.mark.parametrize(("expr", "offset"), [("time+6", 6), ("time-1", -1)])
def test_expression_dim_exports_and_matches_pytorch(expr: str, offset: int, rng: np.random.Generator) -> None:
    m = randomize(EncoderDecoder())
    model = export(m, ["enc:batch,time,3", f"dec:batch,{expr},2"])
    dims = {vi.name: _dims(vi) for vi in model.graph.input}
    assert dims == {"enc": ["batch", "time", 3], "dec": ["batch", expr, 2]}
    assert _dims(model.graph.output[0]) == ["batch", expr, 4]
    t = 5
    feeds = {"enc": rand(rng, 2, t, 3), "dec": rand(rng, 2, t + offset, 2)}
    worst(torch_outputs(m, feeds), run_onnx(model, feeds))


def test_sample_sizes_keep_the_relation() -> None:
    a, b = symbol_values([InputSpec("dec", ("batch", "time-20", 2))])
    # time is raised so that time-20 is at least 2 in both runs, and the two runs still differ
    assert a["time-20"] == a["time"] - 20 >= 2 and b["time-20"] == b["time"] - 20 >= 2
    assert a["time"] != b["time"]


def test_synthetic_and_profile_windows_keep_the_relation() -> None:
    model = export(randomize(EncoderDecoder()), ["enc:batch,time,3", "dec:batch,time+6,2"])
    for r in synthetic_sets(input_specs(model), None, seed=0):
        assert r.arrays["dec"].shape[1] == r.arrays["enc"].shape[1] + 6, r.kind
    feeds = make_inputs(plan_inputs(model), batch=2, t=10, seed=0)
    assert feeds["enc"].shape == (2, 10, 3) and feeds["dec"].shape == (2, 16, 2)


def test_recording_that_breaks_the_relation_is_refused(tmp_path: Path, rng: np.random.Generator) -> None:
    model = export(randomize(EncoderDecoder()), ["enc:batch,time,3", "dec:batch,time+6,2"])
    path = tmp_path / "rec.npz"
    np.savez(path, enc=rand(rng, 4, 5, 3), dec=rand(rng, 4, 11, 2))
    load_recording(path, input_specs(model))  # 11 = 5 + 6
    np.savez(path, enc=rand(rng, 4, 5, 3), dec=rand(rng, 4, 9, 2))
    with pytest.raises(BadInputError, match=r"dim 'time\+6' of input 'dec' is 9.*should be 11"):
        load_recording(path, input_specs(model))


# ----- a failed run on a guessed shape: exit 2; a model that cannot be traced: exit 3 --------------
class SecondColumn(nn.Module):
    """Reads one feature column: the guess [batch, time, 1] from the LSTM is wrong."""

    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(1, 8, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.lstm(x[..., 1:2])[0]


class DecoderFirst(nn.Module):
    """A cell loop (loop capture) whose first module with an input_size is the decoder's (24)."""

    def __init__(self) -> None:
        super().__init__()
        self.dec = nn.LSTMCell(24, 8)
        self.enc = nn.LSTM(1, 8, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        _, (h, c) = self.enc(x)
        h, c = h[0], c[0]
        outs = []
        for _ in range(3):
            h, c = self.dec(torch.zeros(x.size(0), 24), (h, c))
            outs.append(h)
        return torch.stack(outs, 1)


class DataBranch(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.lstm = nn.LSTM(3, 4, batch_first=True)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.mean() > 0:  # a branch on tensor data: no export can follow it
            return self.lstm(x)[0]
        return -self.lstm(x)[0]


@pytest.mark.parametrize(("module", "guess"), [
    (SecondColumn, "x as [batch, time, 1]"), (DecoderFirst, "x as [batch, time, 24]"),
])
def test_failed_run_on_a_guessed_shape_is_exit_2(module: type, guess: str) -> None:
    with pytest.raises(BadInputError) as e:
        export(randomize(module()))
    msg = str(e.value)
    assert e.value.exit_code == 2, msg
    assert f"guessed {guess}" in msg and "--input x:" in msg and "must be equal to input_size" in msg, msg


@pytest.mark.parametrize(("module", "spec", "t"), [
    (SecondColumn, "x:batch,time,4", 6), (DecoderFirst, "x:batch,time,1", 6),
])
def test_the_same_models_export_with_the_real_shape(module: type, spec: str, t: int,
                                                    rng: np.random.Generator) -> None:
    m = randomize(module())
    model = export(m, [spec])
    feats = int(spec.rsplit(",", 1)[1])
    feeds = {"x": rand(rng, 3, t, feats)}
    worst(torch_outputs(m, feeds), run_onnx(model, feeds))


def test_untraceable_model_with_declared_input_stays_exit_3() -> None:
    with pytest.raises(UnsupportedModelError) as e:
        export(randomize(DataBranch()), ["x:batch,time,3"])
    assert e.value.exit_code == 3
