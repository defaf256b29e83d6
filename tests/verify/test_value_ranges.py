"""verify refuses recorded windows whose integer input lies outside the range declared at export.

The exported graph took a branch for every input inside ``lengths`` in ``1..time`` (the source's
``if lengths.max() <= 0`` is False there), so a window with length 0 is outside what the file is
right for; the expected window and value are worked out by hand from the arrays written here.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from seqgate.cli.app import app
from torch_range_models import RANGE_GUARDED_NET_SOURCE

pytest.importorskip("torch")
runner = CliRunner()



@pytest.fixture(scope="module")
def exported(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    d = tmp_path_factory.mktemp("ranges")
    (d / "net.py").write_text(RANGE_GUARDED_NET_SOURCE)
    import importlib.util

    import torch

    spec = importlib.util.spec_from_file_location("seqgate_test_ranges_net", d / "net.py")
    assert spec is not None and spec.loader is not None
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    torch.save(mod.build().state_dict(), d / "w.pt")
    r = runner.invoke(app, ["export", f"{d / 'net.py'}:build", "--weights", str(d / "w.pt"),
                            "-o", str(d / "n.onnx"),
                            "--input", "x:batch,time,3", "--input", "lengths:batch:int64=1..time"])
    assert r.exit_code == 0, r.output
    return {"dir": d, "onnx": d / "n.onnx", "source": Path(f"{d / 'net.py'}:build"), "weights": d / "w.pt"}


def _recording(d: Path, name: str, lengths: list[int], time: int = 6) -> Path:
    x = np.random.default_rng(0).normal(size=(len(lengths), time, 3)).astype(np.float32)
    np.savez(d / name, x=x, lengths=np.array(lengths, dtype=np.int64))
    return d / name


def _verify(e: dict[str, Path], rec: Path) -> object:
    return runner.invoke(app, ["verify", str(e["onnx"]), "--source", str(e["source"]), "--weights",
                               str(e["weights"]), "--recording", str(rec), "--quiet"])


def test_windows_inside_the_range_are_compared(exported: dict[str, Path]) -> None:
    r = _verify(exported, _recording(exported["dir"], "ok.npz", [1, 6, 3, 2]))
    assert r.exit_code == 0, r.output


@pytest.mark.parametrize(("lengths", "window", "value"), [([3, 1, 0, 2], 2, 0), ([6, 7, 2], 1, 7)])
def test_a_window_outside_the_range_is_refused(exported: dict[str, Path], lengths: list[int], window: int,
                                               value: int) -> None:
    rec = _recording(exported["dir"], f"bad{window}.npz", lengths)
    r = _verify(exported, rec)
    assert r.exit_code == 2, r.output
    text = " ".join(r.output.split())
    assert f"recording {rec}, input 'lengths': window {window} holds {value}, outside the value range " \
           "1..time (1..6 at this recording's sizes time=6) declared when the model was exported" in text, text
    assert "Drop or repair the windows outside the range, or export again with a range that holds them" in text
    assert "Traceback" not in r.output
