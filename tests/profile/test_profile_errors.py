"""``seqgate profile`` exit codes: 2 with a one-paragraph message for bad usage, 1 for a missed budget."""

from __future__ import annotations

from pathlib import Path

import pytest
from test_profile_core import lstm_model, save
from typer.testing import CliRunner

from seqgate.cli.app import app

runner = CliRunner()
FAST = ["--warmup", "0", "--min-runs", "2", "--min-time", "0"]


@pytest.fixture(scope="module")
def model(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return save(lstm_model(), tmp_path_factory.mktemp("m") / "lstm.onnx")


def _run(*args: str) -> tuple[int, str]:
    r = runner.invoke(app, ["profile", *args])
    return r.exit_code, " ".join(r.output.split())  # rich wraps long lines


@pytest.mark.parametrize(("args", "message"), [
    (["--budget", "128"], "--budget '128' is not of the form T=MS"),
    (["--budget", "8=fast"], "'fast' is not a number of milliseconds"),
    (["--budget", "8=1", "--budget", "8=2"], "two budgets for sequence length 8"),
    (["--percentile", "95"], "--percentile 95: expected one of 50, 90, 99"),
    (["--seq-lens", "1,x"], "--seq-lens '1,x': expected comma-separated whole numbers"),
    (["--batch-sizes", "0"], "--batch-sizes: every value must be at least 1; got 0"),
    (["--batch", "0"], "--batch-sizes: every value must be at least 1; got 0"),  # hidden old spelling
    (["--threads", "1,,2"], "--threads '1,,2'"),
    (["--min-runs", "0"], "--min-runs must be ≥ 1, got 0"),
    (["--warmup", "-1"], "--warmup must be ≥ 0, got -1"),
    (["--seed", "-1"], "--seed must be a seed ≥ 0"),  # numpy refuses negative seeds (was exit 4)
    (["--min-time", "inf"], "--min-time must be a finite number of seconds"),
    (["--budget", "8=inf"], "--budget '8=inf': the latency must be a positive, finite number"),
    (["--min-time", "-1"], "--min-time must be a finite number of seconds"),
    (["--weights", "w.pt"], "--weights was given without --source"),
    (["--source", "missing.keras"], "model file missing.keras does not exist"),
    (["--source", "model.pt"], "looks like a PyTorch checkpoint on its own"),
    (["--report", "no/such/dir/r.json"], "--report no/such/dir/r.json: directory no/such/dir does not exist"),
])
def test_bad_usage_exits_2(model: Path, args: list[str], message: str) -> None:
    code, out = _run(str(model), *FAST, *args)
    assert code == 2, out
    assert "error:" in out and message in out
    assert "Traceback" not in out


def test_every_option_problem_at_once(model: Path) -> None:
    code, out = _run(str(model), *FAST, "--min-runs", "0", "--seed", "-3", "--budget", "8=nan",
                     "--percentile", "95")
    assert code == 2, out
    assert "4 problems" in out
    for piece in ("--min-runs", "--seed", "--budget '8=nan'", "--percentile 95"):
        assert piece in out, piece


def test_sweep_too_large_for_memory_exits_2_with_the_estimate(model: Path) -> None:
    # the model takes 3 features per step (lstm_model's default input); 10**12 steps × 3 × 4 bytes
    # = 1.2e13 bytes ≈ 10.9 TiB, more than any machine this runs on
    code, out = _run(str(model), *FAST, "--seq-lens", str(10**12))
    assert code == 2, out
    assert "inputs alone would take about" in out and "TiB" in out and "× 4 bytes" in out


def test_bad_model_files_exit_2(tmp_path: Path) -> None:
    code, out = _run(str(tmp_path / "none.onnx"))
    assert code == 2 and "does not exist" in out
    junk = tmp_path / "junk.onnx"
    junk.write_bytes(b"\x00\x01 not a protobuf \xff" * 10)
    code, out = _run(str(junk))
    assert code == 2 and "error:" in out and "Traceback" not in out


def test_budget_on_fixed_time_model_exits_2(tmp_path: Path) -> None:
    path = save(lstm_model(time=6), tmp_path / "fixed.onnx")
    code, out = _run(str(path), *FAST, "--budget", "32=5")
    assert code == 2 and "fixes its time dim at 6" in out


def test_missed_budget_exits_1_and_held_budget_exits_0(model: Path) -> None:
    code, out = _run(str(model), *FAST, "--seq-lens", "1,8", "--budget", "8=0.000001")
    assert code == 1, out
    assert "fail" in out and "FAILED: 1 of 1 budget verdicts over budget at p99" in out
    code, out = _run(str(model), *FAST, "--seq-lens", "1,8", "--budget", "8=100000", "--percentile", "50")
    assert code == 0, out
    assert "PASSED: every budget met at p50" in out
