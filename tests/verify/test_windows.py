"""Recordings (load, mmap, validate), CSV windows against hand-made ones, synthetic windows."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from seqgate.cli.app import app
from seqgate.errors import BadInputError
from seqgate.verify.csv_windows import build_recording
from seqgate.verify.recordings import InputSpec, MappedArray, StreamedArray, load_recording, open_arrays
from seqgate.verify.synthetic import synthetic_sets

SPEC = [InputSpec("x", np.dtype("float32"), ("batch", "time", 3))]
runner = CliRunner()


def _rec(rng: np.random.Generator, n: int = 10, t: int = 6) -> np.ndarray:
    return rng.normal(size=(n, t, 3)).astype(np.float32)


def _all(rec, batch: int = 4) -> np.ndarray:  # type: ignore[no-untyped-def]
    return np.concatenate([f["x"] for _, f in rec.batches(batch)])


def test_npy_npz_and_compressed_give_the_same_windows(tmp_path: Path, rng: np.random.Generator) -> None:
    x = _rec(rng)
    np.save(tmp_path / "a.npy", x)
    np.savez(tmp_path / "b.npz", anything=x)
    np.savez_compressed(tmp_path / "c.npz", x=x)
    ra, rb, rc = (load_recording(tmp_path / n, SPEC) for n in ("a.npy", "b.npz", "c.npz"))
    assert isinstance(rb.arrays["x"], MappedArray) and isinstance(rb.arrays["x"].array, np.memmap)
    assert isinstance(rc.arrays["x"], StreamedArray)
    for r in (ra, rb, rc):
        assert r.windows == 10 and np.array_equal(_all(r), x)
    # a stream read backwards re-opens and still gives the right rows
    s = rc.arrays["x"]
    assert np.array_equal(s.read(7, 9), x[7:9]) and np.array_equal(s.read(1, 3), x[1:3])


def test_single_array_is_used_whatever_its_key_and_reserved_keys_are_skipped(tmp_path: Path,
                                                                           rng: np.random.Generator) -> None:
    x = _rec(rng)
    np.savez(tmp_path / "r.npz", windows=x, targets=np.zeros((10, 1), np.float32))
    assert np.array_equal(_all(load_recording(tmp_path / "r.npz", SPEC)), x)


def _expect(tmp_path: Path, arrays: dict, needle: str, specs=SPEC) -> str:  # type: ignore[no-untyped-def]
    np.savez(tmp_path / "bad.npz", **arrays)
    with pytest.raises(BadInputError) as e:
        rec = load_recording(tmp_path / "bad.npz", specs)
        list(rec.batches(4))
    assert needle in str(e.value), str(e.value)
    return str(e.value)


def test_wrong_shape_names_the_array_and_both_shapes(tmp_path: Path, rng: np.random.Generator) -> None:
    msg = _expect(tmp_path, {"x": rng.normal(size=(4, 6, 5)).astype(np.float32)}, "axis 2 has 5")
    assert "'x'" in msg and "[4, 6, 5]" in msg and "float32 [batch, time, 3]" in msg


def test_wrong_rank_wrong_dtype_empty(tmp_path: Path, rng: np.random.Generator) -> None:
    _expect(tmp_path, {"x": np.zeros((4, 3), np.float32)}, "rank 2")
    _expect(tmp_path, {"x": np.zeros((4, 6, 3), np.float64)}, "dtype float64")
    _expect(tmp_path, {"x": np.zeros((0, 6, 3), np.float32)}, "holds no windows")


def test_nan_and_inf_name_the_window(tmp_path: Path, rng: np.random.Generator) -> None:
    x = _rec(rng)
    x[7, 2, 1] = np.nan
    msg = _expect(tmp_path, {"x": x}, "window 7 holds NaN")
    assert "(2, 1)" in msg
    x[7, 2, 1] = 0
    x[9, 0, 0] = -np.inf
    _expect(tmp_path, {"x": x}, "window 9 holds Inf")


def test_wrong_key_names_for_a_two_input_model(tmp_path: Path) -> None:
    specs = [InputSpec("a", np.dtype("float32"), ("batch", "time", 3)),
             InputSpec("b", np.dtype("float32"), ("batch", 2))]
    msg = _expect(tmp_path, {"a": np.zeros((2, 4, 3), np.float32), "c": np.zeros((2, 2), np.float32)},
                  "no array for model input(s) ['b']", specs)
    assert "found ['a', 'c']" in msg
    _expect(tmp_path, {"a": np.zeros((2, 4, 3), np.float32), "b": np.zeros((3, 2), np.float32)},
            "different numbers of windows", specs)


def test_two_candidate_arrays_for_one_input(tmp_path: Path) -> None:
    _expect(tmp_path, {"p": np.zeros((2, 4, 3), np.float32), "q": np.zeros((2, 4, 3), np.float32)},
            "2 candidate arrays")


def test_truncated_and_foreign_files(tmp_path: Path, rng: np.random.Generator) -> None:
    x = _rec(rng, n=50)
    for name, save in (("t.npy", np.save), ("t.npz", np.savez)):
        p = tmp_path / name
        save(p, x)
        data = p.read_bytes()
        p.write_bytes(data[: len(data) // 2])
        with pytest.raises(BadInputError, match="truncated"):
            load_recording(p, SPEC)
    (tmp_path / "junk.npz").write_bytes(b"not a zip at all")
    with pytest.raises(BadInputError, match=r"not a readable \.npz"):
        load_recording(tmp_path / "junk.npz", SPEC)
    with pytest.raises(BadInputError, match=r"expected a \.npy or \.npz"):
        (tmp_path / "r.csv").write_text("a\n1\n")
        load_recording(tmp_path / "r.csv", SPEC)
    np.save(tmp_path / "obj.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(BadInputError, match="Python objects"):
        open_arrays(tmp_path / "obj.npy")


# ----- CSV windows ---------------------------------------------------------------------------
def _csv(path: Path, rows: int = 12) -> np.ndarray:
    data = np.column_stack([np.arange(rows) * 1.0, np.arange(rows) * 10.0 + 0.5, np.arange(rows) * -1.0])
    lines = ["t,a,b,y"] + [f"2024-01-{i + 1:02d},{r[0]},{r[1]},{r[2]}" for i, r in enumerate(data)]
    path.write_text("\n".join(lines) + "\n")
    return data


def test_windows_with_horizon_match_hand_made(tmp_path: Path) -> None:
    data = _csv(tmp_path / "d.csv")
    r = runner.invoke(app, ["windows", str(tmp_path / "d.csv"), "-o", str(tmp_path / "w.npz"), "--window", "4",
                            "--stride", "3", "--horizon", "2", "--columns", "a,b", "--targets", "y"])
    assert r.exit_code == 0, r.output
    z = np.load(tmp_path / "w.npz")
    # by hand: starts 0,3,6 (start 9 would need rows up to 9+4-1+2 = 14 > 11)
    want_x = np.stack([data[s:s + 4, :2] for s in (0, 3, 6)]).astype(np.float32)
    want_y = np.stack([data[s + 4 - 1 + 2, 2:] for s in (0, 3, 6)]).astype(np.float32)
    assert np.array_equal(z["windows"], want_x) and np.array_equal(z["targets"], want_y)
    meta = json.loads(str(z["seqgate_windows"]))
    assert (meta["window"], meta["stride"], meta["horizon"], meta["columns"]) == (4, 3, 2, ["a", "b"])
    import hashlib

    assert meta["csv_sha256"] == hashlib.sha256((tmp_path / "d.csv").read_bytes()).hexdigest()


def test_windows_per_step_targets_when_horizon_is_zero(tmp_path: Path) -> None:
    data = _csv(tmp_path / "d.csv", rows=6)
    build_recording(tmp_path / "d.csv", tmp_path / "w.npz", window=5, columns=["a"], targets=["y", "b"])
    z = np.load(tmp_path / "w.npz")
    assert z["windows"].shape == (2, 5, 1) and z["targets"].shape == (2, 5, 2)
    assert np.array_equal(z["targets"][1], data[1:6][:, [2, 1]].astype(np.float32))


@pytest.mark.parametrize("body, needle", [
    ("a,b\n1,2\n3,\n", "line 3, column 'b': missing value"),
    ("a,b\n1,2\n3,x7\n", "line 3, column 'b': 'x7' is not a number"),
    ("a,b\n1,2\nnan,4\n", "line 3, column 'a': missing value"),
    ("a,b\n1,2\n1,inf\n", "not finite"),
    ("a,b\n1,2\n3\n", "line 3: 1 cells"),
    ("", "the CSV is empty"),
])
def test_bad_csv_names_row_and_column(tmp_path: Path, body: str, needle: str) -> None:
    (tmp_path / "d.csv").write_text(body)
    r = runner.invoke(app, ["windows", str(tmp_path / "d.csv"), "-o", str(tmp_path / "w.npz"), "--window", "1"])
    assert r.exit_code == 2 and needle in r.output, r.output
    assert not (tmp_path / "w.npz").exists()


def test_text_column_is_refused_unless_left_out(tmp_path: Path) -> None:
    _csv(tmp_path / "d.csv")
    r = runner.invoke(app, ["windows", str(tmp_path / "d.csv"), "-o", str(tmp_path / "w.npz"), "--window", "3"])
    assert r.exit_code == 2 and "column 't'" in r.output
    r = runner.invoke(app, ["windows", str(tmp_path / "d.csv"), "-o", str(tmp_path / "w.npz"), "--window", "30",
                            "--columns", "a"])
    assert r.exit_code == 2 and "one window needs 30" in r.output
    r = runner.invoke(app, ["windows", str(tmp_path / "d.csv"), "-o", str(tmp_path / "w.npz"), "--window", "3",
                            "--columns", "a,zz"])
    assert r.exit_code == 2 and "['zz']" in r.output


# ----- synthetic -----------------------------------------------------------------------------
def test_synthetic_sets_are_seeded_scaled_and_long_only_for_dynamic_time(rng: np.random.Generator) -> None:
    from seqgate.verify.recordings import FeatureStats

    st = {"x": FeatureStats(np.array([1.0, -2.0, 0.0]), np.array([0.5, 2.0, 0.0]), np.zeros(3), np.ones(3),
                            (6, 3))}
    sets = {r.kind: r for r in synthetic_sets(SPEC, st, seed=5)}
    assert list(sets) == ["synthetic:scaled", "synthetic:zeros", "synthetic:constants", "synthetic:extremes",
                          "synthetic:long"]
    again = synthetic_sets(SPEC, st, seed=5)[0]
    assert np.array_equal(_all(sets["synthetic:scaled"]), _all(again))
    x = _all(sets["synthetic:scaled"]).astype(np.float64)
    assert np.abs(x.reshape(-1, 3).mean(axis=0) - [1.0, -2.0, 0.0]).max() < 0.2
    ext = _all(sets["synthetic:extremes"])
    # ±6σ, σ = 1 where the feature is constant (σ = 0)
    assert np.allclose(np.abs(ext - np.array([1.0, -2.0, 0.0], np.float32)), [3.0, 12.0, 6.0])
    assert _all(sets["synthetic:long"]).shape[1] == 24 and not _all(sets["synthetic:zeros"]).any()
    fixed = [InputSpec("x", np.dtype("float32"), ("batch", 6, 3))]
    assert "synthetic:long" not in {r.kind for r in synthetic_sets(fixed, st, seed=5)}
