"""The gate with ``[[variants]]``: one accepted and one rejected variant end to end, the output
folder (accepted files only, replaceable by the next run), the report's variant table, and a
required variant that is rejected failing the gate.

The pressure forecaster demo (a Keras LSTM with a Dense head) is the model; its recording holds
targets, so the forecast-error criterion is judged. The rejected variant is made by a strict
rule: float16 under ``atol = 1e-9`` (float16 keeps 11 significant bits, IEEE 754-2008
binary16, so its outputs differ from float32 by far more than 1e-9).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from typer.testing import CliRunner

from seqgate.cli.app import app

DEMO = Path(__file__).resolve().parents[2] / "fixtures" / "demo"
runner = CliRunner()


def _config(tmp_path: Path, required: str = "false") -> Path:
    text = f"""
[model]
source = "{DEMO / "pressure" / "pressure_forecaster.keras"}"

[verify]
recordings = ["{DEMO / "pressure" / "field_week.npz"}"]
seed = 3

[profile]
seq_lens = [48]
batch_sizes = [1]
threads = [1]
warmup = 1
min_runs = 3
min_time = 0.0
compare_source = false

[[variants]]
kind = "int8_dynamic"
max_forecast_error_increase = 0.25

[[variants]]
kind = "float16"
atol = 1e-9
required = {required}
"""
    p = tmp_path / "gate.toml"
    p.write_text(text, encoding="utf-8")
    return p


def test_gate_keeps_the_accepted_variant_and_reports_both(tmp_path: Path) -> None:
    out = tmp_path / "out"
    res = runner.invoke(app, ["gate", str(_config(tmp_path)), "--out-dir", str(out)])
    assert res.exit_code == 0, res.output
    files = sorted(p.name for p in out.iterdir())
    assert "model.int8_dynamic.onnx" in files and "model.float16.onnx" not in files
    report = json.loads((out / "report.json").read_text())
    by = {v["kind"]: v for v in report["variants"]}
    acc, rej = by["int8_dynamic"], by["float16"]
    assert acc["accepted"] and acc["file"] == str(out / "model.int8_dynamic.onnx")
    assert acc["chosen"] == (acc["speedup"] > 1.0)  # chosen only when faster than float32
    assert not rej["accepted"] and not rej["chosen"] and rej["file"] is None
    assert [c["name"] for c in rej["checks"] if not c["passed"]] == ["tolerance"]
    assert acc["figures"]["forecast"]["output"] == "pressure_next"
    assert acc["latency"] and acc["latency"][0]["speedup_vs_float32"] > 0
    assert rej["latency"], "a rejected variant is still timed in the sweep"
    assert acc["size_bytes"] == (out / "model.int8_dynamic.onnx").stat().st_size
    check = next(c for c in report["checks"] if c["name"] == "variants")
    assert check["passed"] and "float16 rejected (tolerance)" in check["detail"]
    runtimes = {p["runtime"] for p in report["profile"]["points"]}
    assert runtimes == {"onnxruntime", "onnxruntime:int8_dynamic", "onnxruntime:float16"}
    html = (out / "report.html").read_text()
    assert "Reduced-precision variants" in html and "per-step error of int8_dynamic" in html
    assert "| int8_dynamic | accepted" in (out / "report.md").read_text()
    # the folder holds only files the gate writes: the next run replaces it
    again = runner.invoke(app, ["gate", str(_config(tmp_path)), "--out-dir", str(out)])
    assert again.exit_code == 0, again.output


def test_a_required_variant_that_is_rejected_fails_the_gate(tmp_path: Path) -> None:
    out = tmp_path / "out"
    res = runner.invoke(app, ["gate", str(_config(tmp_path, required="true")), "--out-dir", str(out)])
    assert res.exit_code == 1, res.output
    report = json.loads((out / "report.json").read_text())
    check = next(c for c in report["checks"] if c["name"] == "variants")
    assert not check["passed"] and check["detail"].startswith("required variant(s) rejected: float16")
    assert (out / "model.int8_dynamic.onnx").is_file()


def _entry(kind: str, passed: bool, speedups: list[float], required: bool = False) -> dict:
    pts = [{"runtime": f"onnxruntime:{kind}", "seq_len": 8 * (i + 1), "batch": 1, "threads": 1, "p50_ms": 1.0,
            "p99_ms": 1.0, "speedup": s} for i, s in enumerate(speedups)]
    return {"kind": kind, "made": True, "passed": passed, "file": None, "rule": {"required": required},
            "checks": [{"name": "tolerance", "passed": passed, "detail": ""}], "points": pts}


def test_the_fastest_accepted_variant_faster_than_float32_is_chosen() -> None:
    from seqgate.variants.step import conclude

    entries = [_entry("int8_dynamic", True, [1.5, 1.5]), _entry("int8_dynamic_scan", True, [1.0, 4.0]),
               _entry("float16", False, [9.0, 9.0])]
    profile = {"points": [p for e in entries for p in e.pop("points")]}
    check = conclude(entries, profile)
    # geometric means (hand-worked): sqrt(1.5·1.5) = 1.5, sqrt(1·4) = 2, sqrt(9·9) = 9 (rejected)
    assert [e["speedup"] for e in entries] == pytest.approx([1.5, 2.0, 9.0], rel=1e-12)
    assert [e["chosen"] for e in entries] == [False, True, False]
    assert check["passed"] and "float16 rejected (tolerance)" in check["detail"]
    slow = [_entry("int8_dynamic", True, [0.5, 0.8], required=True), _entry("float16", False, [2.0], True)]
    profile = {"points": [p for e in slow for p in e.pop("points")]}
    check = conclude(slow, profile)
    assert not any(e["chosen"] for e in slow)  # slower than float32: nothing to choose
    assert not check["passed"] and check["detail"].startswith("required variant(s) rejected: float16")
