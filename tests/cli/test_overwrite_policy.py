"""The one overwrite policy: rerun without flags replaces seqgate's own files; anything else needs --force.

Each file kind is checked both ways: a file seqgate wrote (made by the real command) is
recognised, and a file of the same suffix written by someone else is not.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from seqgate.cli.app import app
from seqgate.util.ownership import written_by_seqgate

DEMO = Path(__file__).resolve().parents[2] / "fixtures" / "demo"
runner = CliRunner()
SOURCE = f"{DEMO / 'vibration' / 'vibration_model.py'}:build_model"
WEIGHTS = str(DEMO / "vibration" / "vibration_model.pt")


def _export(out: Path, *extra: str) -> int:
    return runner.invoke(app, ["export", SOURCE, "--weights", WEIGHTS, "-o", str(out), *extra]).exit_code


def test_export_rerun_replaces_its_own_file_without_force(tmp_path: Path) -> None:
    out = tmp_path / "m.onnx"
    assert _export(out) == 0
    assert written_by_seqgate(out)
    first = out.read_bytes()
    assert _export(out) == 0  # a CI rerun: no --force needed
    assert out.read_bytes() == first  # deterministic export (DESIGN.md)


def test_export_refuses_a_foreign_onnx_file(tmp_path: Path) -> None:
    import onnx
    from onnx import TensorProto, helper

    out = tmp_path / "theirs.onnx"
    # A valid ONNX model from another producer (onnx.helper, producer_name set by hand).
    g = helper.make_graph([helper.make_node("Identity", ["x"], ["y"])], "g",
                          [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1])],
                          [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1])])
    onnx.save(helper.make_model(g, producer_name="someone-else"), str(out))
    before = out.read_bytes()
    r = runner.invoke(app, ["export", SOURCE, "--weights", WEIGHTS, "-o", str(out)])
    assert r.exit_code == 2 and "not written by seqgate" in r.output and "--force" in r.output
    assert out.read_bytes() == before
    assert _export(out, "--force") == 0


@pytest.mark.parametrize("name,content", [
    ("r.json", b'{"schema": "other/1"}'), ("r.md", b"# notes\n"), ("r.xml", b'<testsuites name="pytest"/>'),
    ("r.csv", b"a,b\n1,2\n"), ("r.png", b"\x89PNG\r\n\x1a\n"), ("r.npz", b"PK\x05\x06" + b"\0" * 18),
    ("r.onnx", b"\x08\x08\x12\x05other"), ("r.txt", b"seqgate"),
])
def test_foreign_files_are_not_taken_for_seqgate_s(tmp_path: Path, name: str, content: bytes) -> None:
    p = tmp_path / name
    p.write_bytes(content)
    assert not written_by_seqgate(p)


def test_profile_outputs_carry_the_mark(tmp_path: Path) -> None:
    model = tmp_path / "m.onnx"
    assert _export(model) == 0
    outs = {k: tmp_path / f"p.{k}" for k in ("json", "csv", "png")}
    r = runner.invoke(app, ["profile", str(model), "--seq-lens", "8", "--min-runs", "2", "--min-time", "0",
                            "--warmup", "0", "--report", str(outs["json"]), "--csv", str(outs["csv"]),
                            "--plot", str(outs["png"])])
    assert r.exit_code == 0, r.output
    for p in outs.values():
        assert written_by_seqgate(p), p


def test_windows_rerun_replaces_its_own_recording(tmp_path: Path) -> None:
    csv = tmp_path / "field.csv"
    shutil.copy(DEMO / "pressure" / "field_week.csv", csv)
    out = tmp_path / "w.npz"
    args = ["windows", str(csv), "-o", str(out), "--window", "12", "--columns",
            "inlet_flow_lps,reservoir_level_m,pump_speed_pct", "--targets", "node_pressure_m"]
    first = runner.invoke(app, args)
    assert first.exit_code == 0, first.output
    assert written_by_seqgate(out)
    assert runner.invoke(app, args).exit_code == 0


@pytest.mark.parametrize("name", ["notes.json", "notes.md"])
def test_verify_refuses_to_replace_a_foreign_report(tmp_path: Path, name: str) -> None:
    model = tmp_path / "m.onnx"
    assert _export(model) == 0
    foreign = tmp_path / name
    foreign.write_text('{"schema": "someone-else/1"}' if name.endswith(".json") else "# my notes\n")
    before = foreign.read_bytes()
    option = "--report" if name.endswith(".json") else "--summary"
    args = ["verify", str(model), "--source", SOURCE, "--weights", WEIGHTS, "--synthetic", "--quiet",
            option, str(foreign)]
    r = runner.invoke(app, args)
    assert r.exit_code == 2 and "not written by seqgate" in r.output, r.output
    assert foreign.read_bytes() == before
    r = runner.invoke(app, [*args, "--force"])
    assert r.exit_code == 0, r.output
    assert written_by_seqgate(foreign)
    assert runner.invoke(app, args).exit_code == 0  # now seqgate's own: replaced without --force
