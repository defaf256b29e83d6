"""``seqgate export`` through the CLI: success, every error of issue 2 item 5, exit codes, files left.

Exit codes (DESIGN.md): 2 bad input or a file that would need code execution to load, 3 a
model with layers seqgate cannot export exactly. No run may print a traceback or leave an
output or temp file behind when it fails.
"""

from __future__ import annotations

import zipfile
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import pytest

import keras_models as km
from cli_helpers import invoke as _invoke

pytestmark = pytest.mark.filterwarnings("ignore:__array__ implementation:DeprecationWarning")


@pytest.fixture(scope="module")
def files(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Model files made once: a good one (.keras and .h5), an unsupported one, unsafe ones, bad ones."""
    k = km.keras()
    L = k.layers
    rng = np.random.default_rng(3)
    d = tmp_path_factory.mktemp("cli_models")
    good = km.functional((None, 3), lambda x: L.Dense(2)(L.LSTM(4)(x)), rng, name="good")
    out = {"good": km.save(good, d / "good.keras"), "good_h5": km.save(good, d / "good.h5")}

    def three_problems(x: Any) -> Any:
        a = L.GRU(3, recurrent_activation="gelu", name="gelu_gru")(x)
        b = L.Bidirectional(L.LSTM(3, stateful=True), name="stateful_bi")(x)
        c = L.SimpleRNN(3, activation="relu6", name="relu6_rnn")(x)  # no ONNX slot for relu6
        return L.Concatenate()([a, b, c])

    bad = km.functional((5, 3), three_problems, rng, name="bad", batch_size=2)
    out["unsupported"] = km.save(bad, d / "unsupported.keras")
    inp = k.Input((None, 3), name="x")
    lam = k.Model(inp, L.Lambda(lambda t: t * 2.0, name="doubler")(inp))
    out["lambda"] = km.save(lam, d / "lambda.keras")
    out["custom"] = _custom_class_file(k, d / "custom.keras")
    data = out["good"].read_bytes()
    (d / "truncated.keras").write_bytes(data[: len(data) // 2])
    (d / "garbage.keras").write_bytes(b"\x00\x01not a zip" * 50)
    (d / "empty.keras").write_bytes(b"")
    h5 = out["good_h5"].read_bytes()
    (d / "truncated.h5").write_bytes(h5[: len(h5) // 3])
    (d / "zip_as.h5").write_bytes(data)
    with zipfile.ZipFile(d / "bad_config.keras", "w") as z:
        z.writestr("config.json", "{ this is not json")
        z.writestr("metadata.json", "{}")
    (d / "notes.txt").write_text("hello")
    onnx.save(onnx.helper.make_model(onnx.helper.make_graph([], "g", [], [])), str(d / "model_onnx.keras"))
    for name in ("truncated.keras", "garbage.keras", "empty.keras", "truncated.h5", "zip_as.h5",
                 "bad_config.keras", "notes.txt", "model_onnx.keras"):
        out[name] = d / name
    return out


def _custom_class_file(k: Any, path: Path) -> Path:
    """A model using a registered custom layer, saved, then unregistered (as in a fresh process)."""

    @k.saving.register_keras_serializable(package="invented")
    class Doubler(k.layers.Layer):  # type: ignore[misc]
        def call(self, x: Any) -> Any:
            return x * 2.0

    inp = k.Input((None, 3), name="x")
    km.save(k.Model(inp, Doubler(name="doubler")(inp)), path)
    k.saving.get_custom_objects().pop("invented>Doubler", None)
    return path


def _leftovers(d: Path, before: set[str]) -> set[str]:
    return {p.name for p in d.iterdir()} - before


def test_export_success_message(files: dict[str, Path], tmp_path: Path) -> None:
    out = tmp_path / "good.onnx"
    r = _invoke("export", str(files["good"]), "-o", str(out))
    assert r.exit_code == 0, r.output
    assert f"wrote {out} (opset 17," in r.output and "probes)" in r.output
    m = onnx.load(str(out))
    assert [n.op_type for n in m.graph.node].count("LSTM") == 1
    assert {p.name for p in tmp_path.iterdir()} == {"good.onnx"}  # no temp file left


def test_export_h5_with_opset(files: dict[str, Path], tmp_path: Path) -> None:
    out = tmp_path / "good.onnx"
    r = _invoke("export", str(files["good_h5"]), "-o", str(out), "--opset", "19")
    assert r.exit_code == 0, r.output
    assert onnx.load(str(out)).opset_import[0].version == 19


@pytest.mark.parametrize("opset", ["16", "29", "7"])
def test_opset_out_of_range(opset: str, files: dict[str, Path], tmp_path: Path) -> None:
    r = _invoke("export", str(files["good"]), "-o", str(tmp_path / "x.onnx"), "--opset", opset)
    assert r.exit_code == 2
    assert f"--opset {opset} is outside the supported range" in r.output
    assert not list(tmp_path.iterdir())


def test_every_unsupported_layer_in_one_message(files: dict[str, Path], tmp_path: Path) -> None:
    r = _invoke("export", str(files["unsupported"]), "-o", str(tmp_path / "x.onnx"))
    assert r.exit_code == 3, r.output
    needles = ("gelu_gru (GRU)", "'gelu'", "stateful_bi (Bidirectional)", "stateful=True",
               "relu6_rnn (SimpleRNN)")
    for needle in needles:
        assert needle in r.output, (needle, r.output)
    assert r.output.count("error:") == 1
    assert r.output.count("\n  - ") == 3
    assert not list(tmp_path.iterdir())


@pytest.mark.parametrize(("name", "needle"), [("lambda", "Lambda"), ("custom", "custom class")])
def test_code_execution_refused(name: str, needle: str, files: dict[str, Path], tmp_path: Path) -> None:
    r = _invoke("export", str(files[name]), "-o", str(tmp_path / "x.onnx"))
    assert r.exit_code == 2, r.output
    assert needle in r.output and "run" in r.output  # says loading would run code
    assert not list(tmp_path.iterdir())


BAD_FILES = ["truncated.keras", "garbage.keras", "empty.keras", "truncated.h5", "zip_as.h5", "bad_config.keras",
             "notes.txt", "model_onnx.keras"]


@pytest.mark.parametrize("name", BAD_FILES)
def test_bad_files_exit_2(name: str, files: dict[str, Path], tmp_path: Path) -> None:
    before = {p.name for p in files[name].parent.iterdir()}
    r = _invoke("export", str(files[name]), "-o", str(tmp_path / "x.onnx"))
    assert r.exit_code == 2, r.output
    assert "error:" in r.output and str(files[name].name) in r.output
    assert not list(tmp_path.iterdir())
    assert _leftovers(files[name].parent, before) == set()


def test_missing_file_and_directory(files: dict[str, Path], tmp_path: Path) -> None:
    r = _invoke("export", str(tmp_path / "nope.keras"), "-o", str(tmp_path / "x.onnx"))
    assert r.exit_code == 2 and "does not exist" in r.output
    r = _invoke("export", str(files["good"]), "-o", str(tmp_path / "no_dir" / "x.onnx"))
    assert r.exit_code == 2 and "does not exist" in r.output


def test_existing_output_needs_force(files: dict[str, Path], tmp_path: Path) -> None:
    out = tmp_path / "x.onnx"
    out.write_bytes(b"precious")
    r = _invoke("export", str(files["good"]), "-o", str(out))
    assert r.exit_code == 2 and "--force" in r.output
    assert out.read_bytes() == b"precious"
    r = _invoke("export", str(files["good"]), "-o", str(out), "--force")
    assert r.exit_code == 0, r.output
    onnx.checker.check_model(onnx.load(str(out)), full_check=True)
    assert {p.name for p in tmp_path.iterdir()} == {"x.onnx"}


def test_failed_export_keeps_existing_file_with_force(files: dict[str, Path], tmp_path: Path) -> None:
    out = tmp_path / "x.onnx"
    out.write_bytes(b"precious")
    r = _invoke("export", str(files["unsupported"]), "-o", str(out), "--force")
    assert r.exit_code == 3
    assert out.read_bytes() == b"precious"
    assert {p.name for p in tmp_path.iterdir()} == {"x.onnx"}


def test_export_help() -> None:
    r = _invoke("export", "--help")
    assert r.exit_code == 0
    for opt in ("--out", "--opset", "--force"):
        assert opt in r.output
