"""Inputs that were silently wrong or misdiagnosed: repeated CSV columns, weights files that are not
weights, a damaged Keras config, an ONNX file that does not fit its source. Each is exit 2 with a
message that says what the file is and what to do; nothing is written, no traceback. Outputs are
written with the user's umask (POSIX open(2): a new file gets ``mode & ~umask``, 0o666 for data).
"""

from __future__ import annotations

import os
import stat
import textwrap
import zipfile
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from cli_helpers import invoke as _invoke
from torch_models import FACTORY_FILE

DEMO = Path(__file__).resolve().parents[2] / "fixtures" / "demo"


# ----- windows -----------------------------------------------------------------------------
def test_repeated_csv_column_is_refused(tmp_path: Path) -> None:
    csv = tmp_path / "d.csv"
    rows = "\n".join(f"{i},{i * 0.5},{i * 2.0},{i + 1.0}" for i in range(20))
    csv.write_text("t,flow,level,flow\n" + rows + "\n")
    out = tmp_path / "w.npz"
    r = _invoke("windows", str(csv), "-o", str(out), "--window", "4", "--targets", "level")
    assert r.exit_code == 2, r.output
    assert "'flow' twice" in r.output and "columns 2 and 4" in r.output
    assert not out.exists()


@pytest.mark.parametrize(("cols", "tgts", "needle"), [
    ("flow,flow", "level", "--columns names column 'flow' more than once"),
    ("flow,level", "level", "'level' is in both --columns and --targets"),
])
def test_repeated_column_options_are_refused(cols: str, tgts: str, needle: str, tmp_path: Path) -> None:
    csv = tmp_path / "d.csv"
    csv.write_text("t,flow,level\n" + "\n".join(f"{i},{i},{i}" for i in range(10)) + "\n")
    r = _invoke("windows", str(csv), "-o", str(tmp_path / "w.npz"), "--window", "3", "--columns", cols,
                "--targets", tgts)
    assert r.exit_code == 2 and needle in r.output, r.output


def test_windows_prints_the_columns_it_used(tmp_path: Path) -> None:
    csv = tmp_path / "d.csv"
    csv.write_text("t,flow,level\n" + "\n".join(f"{i},{i},{i}" for i in range(10)) + "\n")
    r = _invoke("windows", str(csv), "-o", str(tmp_path / "w.npz"), "--window", "3", "--targets", "level")
    assert r.exit_code == 0, r.output
    # the time index is taken as a feature by default: the output says so, so it can be seen
    assert "features: t, flow" in r.output and "targets: level" in r.output


# ----- PyTorch weights ---------------------------------------------------------------------
def _weights_case(tmp: Path, kind: str) -> Path:
    p = tmp / f"{kind}.pt"
    if kind == "text":
        p.write_bytes(b"not weights\n")  # 12 bytes of text
    elif kind == "empty":
        p.write_bytes(b"")
    elif kind == "other_zip":
        np.savez(tmp / "arrays.npz", a=np.zeros(3))
        p.write_bytes((tmp / "arrays.npz").read_bytes())
    elif kind == "truncated_zip":
        with zipfile.ZipFile(tmp / "full.zip", "w") as z:
            z.writestr("m/data.pkl", b"x" * 500)
        p.write_bytes((tmp / "full.zip").read_bytes()[:100])
    return p


@pytest.mark.parametrize(("kind", "needle"), [
    ("text", "a text file (12 bytes, starting 'not weights')"),
    ("empty", "an empty file (0 bytes)"),
    ("other_zip", "a zip archive of another kind (it holds a.npy"),
    ("truncated_zip", "probably truncated"),
])
def test_weights_file_that_is_not_weights(kind: str, needle: str, tmp_path: Path) -> None:
    py = tmp_path / "net.py"
    py.write_text(textwrap.dedent(FACTORY_FILE))
    w = _weights_case(tmp_path, kind)
    out = tmp_path / "o.onnx"
    r = _invoke("export", f"{py}:build", "--weights", str(w), "-o", str(out))
    assert r.exit_code == 2, r.output
    assert needle in r.output and "pickled" not in r.output, r.output
    assert "torch.save(model.state_dict()" in r.output
    assert not out.exists()


# ----- Keras archive -----------------------------------------------------------------------
@pytest.mark.parametrize(("config", "needle"), [
    (b'{"class_name": "Functional", "config": {', "config.json inside the Keras archive is not valid JSON"),
    (b"[1, 2]", "is a JSON list without 'class_name'"),
    (None, "the archive has no config.json"),
])
def test_keras_archive_with_damaged_config(config: bytes | None, needle: str, tmp_path: Path) -> None:
    good = zipfile.ZipFile(DEMO / "pressure" / "pressure_forecaster.keras")
    bad = tmp_path / "damaged.keras"
    with zipfile.ZipFile(bad, "w") as z:
        for name in good.namelist():
            if name != "config.json":
                z.writestr(name, good.read(name))
            elif config is not None:
                z.writestr(name, config)
    out = tmp_path / "o.onnx"
    r = _invoke("export", str(bad), "-o", str(out))
    assert r.exit_code == 2, r.output
    assert needle in r.output and "model.save(" in r.output, r.output
    assert not out.exists()


# ----- an ONNX file that does not fit its source -------------------------------------------
def _keras_lstm(keras: Any, path: Path, features: int, units: int, input_name: str = "x") -> Path:
    i = keras.Input((None, features), name=input_name)
    h = keras.layers.LSTM(units, name="lstm")(i)
    keras.Model(i, keras.layers.Dense(1, name="head")(h)).save(path)
    return path


@pytest.mark.parametrize(("features", "units", "name", "needles"), [
    (4, 4, "x", ["input 'x': dims [batch, time, 3] in the ONNX file, [?, ?, 4] in the source"]),
    (3, 4, "y", ["input 'x' is in the ONNX file but the source takes no such input (it takes y)",
                 "input 'y' is required by the source"]),
    (3, 5, "x", ["tensor 'lstm/forward/hidden_sequence': shape", "[32, 16, 1, 4] from ONNX Runtime",
                 "[32, 16, 1, 5] from the source"]),
])
def test_onnx_file_that_does_not_fit_the_keras_source(features: int, units: int, name: str, needles: list[str],
                                                      tmp_path: Path, keras: Any) -> None:
    shipped = tmp_path / "a.onnx"
    first = _keras_lstm(keras, tmp_path / "a.keras", 3, 4)
    assert _invoke("export", str(first), "-o", str(shipped)).exit_code == 0
    other = _keras_lstm(keras, tmp_path / "b.keras", features, units, name)
    r = _invoke("verify", str(shipped), "--source", str(other), "--synthetic", "--quiet")
    assert r.exit_code == 2, r.output
    assert "does not fit the source" in r.output and "unsupported" not in r.output
    for n in needles:
        assert n in r.output, (n, r.output)


def test_onnx_file_that_does_not_fit_the_torch_source(tmp_path: Path) -> None:
    py = tmp_path / "net.py"
    py.write_text(textwrap.dedent(FACTORY_FILE))
    shipped = tmp_path / "a.onnx"
    assert _invoke("export", f"{py}:build", "--untrained", "-o", str(shipped)).exit_code == 0
    other = tmp_path / "other.py"  # the same model with 2 outputs instead of 3
    other.write_text(textwrap.dedent(FACTORY_FILE).replace("nn.Linear(6, 3)", "nn.Linear(6, 2)"))
    r = _invoke("verify", str(shipped), "--source", f"{other}:build", "--synthetic", "--quiet")
    assert r.exit_code == 2, r.output
    assert "output 'output': shape [1, 3] from ONNX Runtime, [1, 2] from the source" in r.output, r.output


# ----- file modes --------------------------------------------------------------------------
@pytest.mark.parametrize(("mask", "mode"), [(0o022, 0o644), (0o027, 0o640), (0o077, 0o600)])
def test_written_files_follow_the_umask(mask: int, mode: int, tmp_path: Path) -> None:
    from seqgate.util.files import current_umask, write_atomic

    old = os.umask(mask)
    try:
        assert current_umask() == mask
        write_atomic(tmp_path / "f.bin", b"data")
        out = tmp_path / "m.onnx"
        r = _invoke("export", str(DEMO / "pressure" / "pressure_forecaster.keras"), "-o", str(out))
        assert r.exit_code == 0, r.output
    finally:
        os.umask(old)
    assert stat.S_IMODE((tmp_path / "f.bin").stat().st_mode) == mode  # 0o666 & ~umask
    assert stat.S_IMODE(out.stat().st_mode) == mode
