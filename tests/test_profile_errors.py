"""``seqgate profile`` exit codes: 2 with a one-paragraph message for bad usage, 1 for a missed budget."""

from __future__ import annotations

from pathlib import Path

import pytest
from typer.testing import CliRunner

from seqgate.cli.app import app
from test_profile_core import lstm_model, save

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
    (["--batch", "0"], "--batch: every value must be at least 1; got 0"),
    (["--threads", "1,,2"], "--threads '1,,2'"),
    (["--min-runs", "0"], "--min-runs must be at least 1, got 0"),
    (["--warmup", "-1"], "--warmup must be 0 or more"),
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
    assert "missed" in out and "a budget was missed" in out
    code, out = _run(str(model), *FAST, "--seq-lens", "1,8", "--budget", "8=100000", "--percentile", "50")
    assert code == 0, out
    assert "every budget holds" in out
