"""One error policy: a bug inside a layer mapping is exit 4 naming the layer, its class and the
mapping (both exporters); operating-system refusals are exit 2 naming the path and the system's
own reason; user text in terminal messages is never read as markup.

The expected OS reasons are taken from the operating system itself (``os.strerror`` of the
errno, or the error a plain ``open`` raises on the same path), not from seqgate.
"""

from __future__ import annotations

import errno
import os
import shutil
import subprocess
import sys
import textwrap
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from typer.testing import CliRunner

from seqgate.cli.app import app

runner = CliRunner()
DEMO = Path(__file__).resolve().parents[2] / "fixtures" / "demo"
KERAS_DEMO = DEMO / "pressure" / "pressure_forecaster.keras"

TORCH_NET = """
import torch
from torch import nn


class Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.rnn = nn.LSTM(3, 4, batch_first=True)
        self.head = nn.Linear(4, 2)

    def forward(self, x):
        y, _ = self.rnn(x)
        return self.head(y)


def build():
    return Net()
"""


def _run(args: list[str]) -> Any:
    r = runner.invoke(app, args)
    assert "Traceback" not in r.output, r.output
    assert r.exception is None or isinstance(r.exception, SystemExit), repr(r.exception)
    return r


def _flat(text: str) -> str:
    return " ".join(text.split())


# ----- bugs in a mapping: exit 4, named ---------------------------------------------------------
def test_keras_mapping_bug_is_exit_4_naming_layer_class_and_mapping(tmp_path: Path, monkeypatch: Any) -> None:
    from seqgate.export.keras import layers

    def broken_dense(b: Any, call: Any) -> list[str]:
        raise KeyError("units")  # a seqgate bug, not a property of the model

    monkeypatch.setitem(layers.LAYERS, "Dense", broken_dense)
    out = tmp_path / "m.onnx"
    r = _run(["export", str(KERAS_DEMO), "-o", str(out)])
    text = _flat(r.output)
    assert r.exit_code == 4, text  # was exit 3 "unsupported", which hid the bug
    assert "(class Dense)" in text and "broken_dense" in text and "KeyError" in text
    assert "internal error while exporting layer" in text and not out.exists()


def test_torch_mapping_bug_is_exit_4_naming_module_class_and_mapping(tmp_path: Path, monkeypatch: Any) -> None:
    import torch

    from seqgate.export.torch import modules

    def broken_linear(b: Any, call: Any) -> str:
        raise IndexError("list index out of range")

    monkeypatch.setitem(modules.MODULES, torch.nn.Linear, broken_linear)
    (tmp_path / "net.py").write_text(textwrap.dedent(TORCH_NET), encoding="utf-8")
    r = _run(["export", f"{tmp_path / 'net.py'}:build", "-o", str(tmp_path / "n.onnx"),
              "--input", "x:batch,time,3", "--untrained"])
    text = _flat(r.output)
    assert r.exit_code == 4, text
    assert "'head (Linear)" in text and "(class Linear)" in text and "broken_linear" in text


# ----- operating-system refusals: exit 2, path and reason ----------------------------------------
def _os_reason(path: Path) -> str:
    """What the operating system says when asked to create ``path`` (the independent oracle)."""
    try:
        with open(path, "wb"):
            pass
    except OSError as e:
        return str(e.strerror)
    path.unlink()
    pytest.skip(f"{path} is writable here")


def test_output_under_proc_is_exit_2_with_the_system_reason(tmp_path: Path) -> None:
    target = Path("/proc/seqgate-test.onnx")
    reason = _os_reason(target)
    r = _run(["export", str(KERAS_DEMO), "-o", str(target)])
    text = _flat(r.output)
    assert r.exit_code == 2, text  # was exit 4 "internal error … a bug in seqgate"
    assert str(target) in text and reason in text and "internal error" not in text


def test_parent_is_a_file_is_exit_2_before_any_work(tmp_path: Path) -> None:
    (tmp_path / "notes.txt").write_text("x")
    for args in (["export", str(KERAS_DEMO), "-o", str(tmp_path / "notes.txt" / "m.onnx")],
                 ["verify", str(tmp_path / "missing.onnx"), "--source", str(KERAS_DEMO), "--synthetic",
                  "--report", str(tmp_path / "notes.txt" / "r.json")]):
        r = _run(args)
        text = _flat(r.output)
        assert r.exit_code == 2, text
        assert f"{tmp_path / 'notes.txt'} is a file" in text


@pytest.fixture
def tiny_tmpfs(tmp_path: Path, request: Any) -> Iterator[Path]:
    """A 64 KiB tmpfs (``ro`` when the test asks): real "no space" / "read-only" conditions."""
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    opts = "size=64k" + (",ro" if getattr(request, "param", "") == "ro" else "")
    if shutil.which("mount") is None or subprocess.run(
            ["mount", "-t", "tmpfs", "-o", opts, "tmpfs", str(mnt)], capture_output=True).returncode != 0:
        pytest.skip("mounting a tmpfs is not permitted here")
    try:
        yield mnt
    finally:
        subprocess.run(["umount", str(mnt)], check=False)


@pytest.mark.parametrize("tiny_tmpfs", ["ro"], indirect=True)
def test_read_only_filesystem_is_exit_2_up_front(tiny_tmpfs: Path) -> None:
    r = _run(["export", str(KERAS_DEMO), "-o", str(tiny_tmpfs / "m.onnx")])
    text = _flat(r.output)
    assert r.exit_code == 2, text
    assert str(tiny_tmpfs / "m.onnx") in text and os.strerror(errno.EROFS) in text


def test_no_space_left_is_exit_2_and_leaves_nothing(tiny_tmpfs: Path, tmp_path: Path) -> None:
    csv = tmp_path / "big.csv"
    rows = np.random.default_rng(0).normal(size=(3000, 4))
    csv.write_text("a,b,c,d\n" + "\n".join(",".join(f"{v:.6f}" for v in row) for row in rows) + "\n")
    out = tiny_tmpfs / "w.npz"
    r = _run(["windows", str(csv), "-o", str(out), "--window", "16"])
    text = _flat(r.output)
    assert r.exit_code == 2, text
    assert str(out) in text and os.strerror(errno.ENOSPC) in text
    assert list(tiny_tmpfs.iterdir()) == []  # no temp file left behind


def test_file_size_limit_is_exit_2_naming_the_path(tmp_path: Path) -> None:
    # RLIMIT_FSIZE (POSIX setrlimit): a write past the limit fails with EFBIG; Python ignores SIGXFSZ
    csv = tmp_path / "big.csv"
    rows = np.random.default_rng(0).normal(size=(3000, 4))
    csv.write_text("a,b,c,d\n" + "\n".join(",".join(f"{v:.6f}" for v in row) for row in rows) + "\n")
    out = tmp_path / "out" / "w.npz"
    out.parent.mkdir()
    code = (
        "import resource, sys\n"
        "resource.setrlimit(resource.RLIMIT_FSIZE, (65536, 65536))\n"
        "from seqgate.cli.app import main\n"
        f"sys.argv = ['seqgate', 'windows', {str(csv)!r}, '-o', {str(out)!r}, '--window', '16']\n"
        "main()\n"
    )
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=os.environ.copy())
    err = _flat(p.stderr)
    assert p.returncode == 2, err
    assert str(out) in err and os.strerror(errno.EFBIG) in err and "internal error" not in err
    assert list(out.parent.iterdir()) == []


# ----- user text is never markup ---------------------------------------------------------------
def test_gate_message_keeps_brackets_and_odd_output_path_works(tmp_path: Path) -> None:
    bad = tmp_path / "flat.npz"
    np.savez(bad, x=np.zeros((4, 3), np.float32))  # rank 2: the message says how to lay windows out
    cfg = tmp_path / "gate.toml"
    cfg.write_text(f'[model]\nsource = "{KERAS_DEMO}"\n[verify]\nrecordings = ["{bad}"]\n', encoding="utf-8")
    out = tmp_path / "reports [/] v2"
    r = _run(["gate", str(cfg), "--out-dir", str(out), "--quiet"])
    text = _flat(r.output)
    assert r.exit_code == 2, text
    assert "Lay the windows out as [windows, steps, features]." in text  # was "Lay the windows out as ."
    assert (out / "report.json").is_file() and str(out) in text  # was a crash after writing the reports
