"""Settings: one parser per value, one default per setting, the same verdict from every front end.

External references: IEEE-754 (NaN compares false with everything, so ``nan < 0`` is false and
a check written as ``value < 0`` lets NaN through; ``inf`` is not finite); numpy's
``default_rng`` refuses negative seeds (checked below against numpy itself); RFC 3629 (the byte
0xFF never occurs in UTF-8).
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from typer.main import get_command
from typer.testing import CliRunner

from seqgate.cli.app import app
from seqgate.errors import EXIT_BAD_INPUT, BadInputError
from seqgate.settings import (
    CLI,
    CONFIG,
    PYTHON,
    SETTINGS,
    Budget,
    Problems,
    check_input_memory,
    parse_seed,
    parse_settings,
    parse_tolerance,
    setting,
)
from seqgate.settings.memory import input_bytes

runner = CliRunner()


# ----- the parsers ------------------------------------------------------------------------------
@pytest.mark.parametrize("value", [math.nan, math.inf, -math.inf, -1e-9, True, "1e-4", None])
def test_tolerance_refuses_what_is_not_a_finite_non_negative_number(value: Any) -> None:
    with pytest.raises(BadInputError, match=r"^\[verify\] atol must be"):
        parse_tolerance(value, "[verify] atol")


def test_tolerance_accepts_zero_and_integers() -> None:
    assert parse_tolerance(0, "--atol") == 0.0 and parse_tolerance(1, "--atol") == 1.0


def test_negative_seed_is_refused_as_numpy_refuses_it() -> None:
    with pytest.raises(ValueError):  # numpy itself: the reason a negative seed used to crash (exit 4)
        np.random.default_rng(-1)
    with pytest.raises(BadInputError, match="--seed must be a seed ≥ 0"):
        parse_seed(-1, "--seed")
    assert parse_seed(0, "--seed") == 0


def test_messages_name_the_setting_as_written_in_each_place() -> None:
    for place, where in ((CLI, "--min-runs"), (CONFIG, "[profile] min_runs"), (PYTHON, "argument min_runs")):
        problems = Problems()
        parse_settings("profile", {"min_runs": 0}, place, problems)
        assert problems.items == [f"{where} must be ≥ 1, got 0."]


def test_every_problem_is_collected() -> None:
    problems = Problems()
    got = parse_settings("verify", {"atol": math.nan, "seed": -1, "task": "guess", "batch_size": 0,
                                    "tolerance": [{"atol": -1.0}]}, CONFIG, problems)
    assert len(problems.items) == 6  # the override has two problems: no match, atol < 0
    assert got["atol"] == setting("verify", "atol").default  # a bad value falls back to the default
    with pytest.raises(BadInputError) as e:
        problems.raise_if_any("gate config g.toml")
    assert str(e.value).startswith("gate config g.toml has 6 problems")


def test_typed_values_pass_through_unchanged() -> None:
    problems = Problems()
    got = parse_settings("profile", {"budget": (Budget(8, 1.0),), "seq_lens": (4, 2)}, PYTHON, problems)
    assert not problems.items
    assert got["budget"] == (Budget(8, 1.0),) and got["seq_lens"] == (2, 4)


def test_input_memory_estimate_hand_worked() -> None:
    # 4 × 1000 × 3 float32 elements = 12 000 elements × 4 bytes = 48 000 bytes
    assert input_bytes(4, 1000, 3) == 48_000
    check_input_memory(4, 1000, 3, "--seq-lens", available=48_000)  # exactly fits
    with pytest.raises(BadInputError) as e:
        check_input_memory(4, 1000, 3, "--seq-lens", available=47_999)
    msg = str(e.value)
    assert msg.startswith("--seq-lens: at T=1000, batch size 4")
    assert "about 46.9 KiB (4 × 1000 × 3 features × 4 bytes)" in msg  # 48 000 / 1024 = 46.875


# ----- one default per setting ------------------------------------------------------------------
def _options(command: str) -> dict[str, Any]:
    cmd = get_command(app).commands[command]  # type: ignore[attr-defined]
    return {opt: p for p in cmd.params for opt in (*p.opts, *p.secondary_opts)}


@pytest.mark.parametrize("st", [s for s in SETTINGS if s.cli], ids=lambda s: s.key)
def test_cli_default_is_the_setting_default(st: Any) -> None:
    command = "profile" if st.section == "profile" else "verify"
    opt = _options(command)[st.cli]
    if st.key in ("atol", "rtol"):
        # not given → the tolerance file, else the default; the help says the default
        assert opt.default is None and f"{st.default:g}" in opt.help
        return
    if st.key in ("recordings", "budget", "call_budget"):
        assert not opt.default  # repeatable; nothing by default
        return
    text = isinstance(opt.default, str) and st.key != "task"  # comma lists are parsed as the CLI does
    default = st.parse(opt.default, st.cli) if text else opt.default
    assert default == st.default, (st.cli, opt.default)


def test_seed_default_is_shared_by_verify_and_profile() -> None:
    assert _options("verify")["--seed"].default == _options("profile")["--seed"].default == setting(
        "verify", "seed").default


def test_old_spellings_are_hidden_aliases() -> None:
    assert _options("verify")["--windows"].hidden and _options("profile")["--batch"].hidden
    assert _options("gate")["--out"].hidden


# ----- exit codes through the command line ------------------------------------------------------
def _run(args: list[str]) -> tuple[int, str]:
    r = runner.invoke(app, args)
    return r.exit_code, " ".join(r.output.split())


def test_verify_reports_every_bad_option_before_loading_anything(tmp_path: Path) -> None:
    missing = str(tmp_path / "none.onnx")  # never opened: the options are checked first
    code, out = _run(["verify", missing, "--source", "m.keras", "--synthetic", "--atol", "nan", "--rtol", "-1",
                      "--seed", "-1", "--batch-size", "0", "--task", "guess"])
    assert code == EXIT_BAD_INPUT, out
    assert "5 problems" in out and "does not exist" not in out
    for piece in ("--atol must be a finite number ≥ 0, got nan", "--rtol must be", "--seed must be a seed ≥ 0",
                  "--batch-size must be ≥ 1", "--task 'guess'"):
        assert piece in out, piece


def test_verify_non_utf8_tolerance_file_exits_2(tmp_path: Path) -> None:
    tol = tmp_path / "tol.toml"
    tol.write_bytes(b"atol = 1e-4 # \xff\n")  # RFC 3629: 0xff is never UTF-8 (was exit 4 from verify)
    code, out = _run(["verify", str(tmp_path / "m.onnx"), "--source", "m.keras", "--synthetic",
                      "--tolerances", str(tol)])
    assert code == EXIT_BAD_INPUT and "is not UTF-8 text" in out and "Traceback" not in out


def test_verify_old_windows_option_still_works(tmp_path: Path) -> None:
    code, out = _run(["verify", str(tmp_path / "m.onnx"), "--source", "m.keras", "--windows", "r.npz"])
    assert code == EXIT_BAD_INPUT and "No such option" not in out and "does not exist" in out


def _gate_config(tmp_path: Path, body: str) -> Path:
    (tmp_path / "m.keras").write_bytes(b"PK\x03\x04")  # existence is all validation checks
    (tmp_path / "rec.npz").write_bytes(b"PK\x03\x04")
    p = tmp_path / "gate.toml"
    p.write_text('[model]\nsource = "m.keras"\n' + body, encoding="utf-8")
    return p


@pytest.mark.parametrize(("body", "piece"), [
    ('[verify]\nrecordings = ["rec.npz"]\natol = nan\n', "[verify] atol must be a finite number ≥ 0, got nan"),
    ('[verify]\nrecordings = ["rec.npz"]\n[[verify.tolerance]]\natol = 1e-3\n',
     "[[verify.tolerance]] entry 1: match is required"),  # was a KeyError, exit 4
    ('[verify]\nrecordings = ["rec.npz"]\n[[verify.tolerance]]\nmatch = "x"\natol = -1.0\n',
     "[[verify.tolerance]] entry 1: atol must be a finite number ≥ 0, got -1.0"),
    ('[verify]\nrecordings = ["rec.npz"]\nseed = -1\n', "[verify] seed must be a seed ≥ 0"),  # was exit 4
    ('[verify]\nrecordings = ["rec.npz"]\n[profile]\n[[profile.budget]]\nseq_len = 8\nms = inf\n',
     "[[profile.budget]] entry 1: the latency must be a positive, finite number of milliseconds, got inf"),
    ('[verify]\nrecordings = ["rec.npz"]\n[profile]\n[[profile.budget]]\nseq_len = 8\n',
     "[[profile.budget]] entry 1: ms is required"),  # was dropped: the gate passed with "no budget declared"
])
def test_gate_config_defects_exit_2_before_anything_runs(tmp_path: Path, body: str, piece: str) -> None:
    out_dir = tmp_path / "out"
    code, out = _run(["gate", str(_gate_config(tmp_path, body)), "--out-dir", str(out_dir), "--quiet"])
    assert code == EXIT_BAD_INPUT, out
    assert piece in out
    assert not out_dir.exists()  # nothing exported, nothing written
    assert "--atol" not in out and "--budget" not in out  # no option the user never typed


def test_fixed_time_budget_message_names_no_option() -> None:
    # budgets reach the profiler as Budget values: its refusal speaks of the budget, not of --budget
    from onnx import TensorProto, helper

    from seqgate.profile.run import lengths_to_measure

    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, ["batch", 6, 3])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, ["batch", 6, 3])
    model = helper.make_model(helper.make_graph([helper.make_node("Identity", ["x"], ["y"])], "g", [x], [y]))
    with pytest.raises(BadInputError) as e:
        lengths_to_measure(model, (6,), (Budget(32, 5.0),))
    assert "the budget at length 32 cannot be checked" in str(e.value) and "--budget" not in str(e.value)
    assert lengths_to_measure(model, (6,), (Budget(6, 5.0),)) == [6]
