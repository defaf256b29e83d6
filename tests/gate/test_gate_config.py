"""Gate config validation: every problem class reported, all in one message, before heavy work."""

from __future__ import annotations

from pathlib import Path

import pytest

from seqgate.errors import EXIT_BAD_INPUT, BadInputError
from seqgate.gate.config import load_gate_config

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures"


def _write(tmp_path: Path, text: str) -> Path:
    (tmp_path / "m.keras").write_bytes(b"PK\x03\x04")  # existence is all validation checks
    (tmp_path / "rec.npz").write_bytes(b"PK\x03\x04")
    p = tmp_path / "gate.toml"
    p.write_text(text, encoding="utf-8")
    return p


def test_minimal_config_gets_defaults(tmp_path: Path) -> None:
    cfg = load_gate_config(
        _write(tmp_path, '[model]\nsource = "m.keras"\n[verify]\nrecordings = ["rec.npz"]\n')
    )
    assert cfg.source == str(tmp_path / "m.keras")
    assert cfg.recordings == (tmp_path / "rec.npz",)
    assert cfg.opset == 17 and cfg.synthetic is False and cfg.percentile == 99
    assert cfg.profile_enabled is False


def test_example_config_is_valid() -> None:
    cfg = load_gate_config(FIXTURES / "gate_example.toml")
    assert cfg.budgets and cfg.budgets[0].seq_len == 64
    assert cfg.tolerances.overrides[0].match == "*/hidden_sequence"


def test_every_problem_in_one_message(tmp_path: Path) -> None:
    text = """
[model]
source = "missing.keras"
[export]
opset = 5
[verify]
recordings = ["nope.npz"]
batchsize = 3
task = "guess"
atol = "small"
[[verify.tolerance]]
match = "x*"
rtoll = 1
[profile]
seq_lens = [16, 0]
percentile = 95
[[profile.budget]]
seq_len = 16
ms = -1.0
[extra]
"""
    with pytest.raises(BadInputError) as ei:
        load_gate_config(_write(tmp_path, text))
    msg = str(ei.value)
    assert ei.value.exit_code == EXIT_BAD_INPUT
    expected = [
        "missing.keras",
        "opset must be in 17..",
        "nope.npz",
        "'batchsize' (did you mean 'batch_size'?)",
        "[verify] task 'guess'",
        "[verify] atol must be a number, got 'small'",
        "'rtoll' (did you mean 'rtol'?)",
        "[[verify.tolerance]] entry 1: give atol and/or rtol",
        "[profile] seq_lens: every value must be at least 1; got 0",
        "[profile] percentile 95: expected one of 50, 90, 99",
        "[[profile.budget]] entry 1: the latency must be a positive, finite number of milliseconds, got -1.0",
        "section 'extra'",
    ]
    for piece in expected:
        assert piece in msg, piece
    assert msg.count("\n  - ") == len(expected)


def test_source_required_and_needs_windows(tmp_path: Path) -> None:
    with pytest.raises(BadInputError) as ei:
        load_gate_config(_write(tmp_path, "[verify]\nsynthetic = false\n"))
    assert "source is required" in str(ei.value)
    assert "needs recordings" in str(ei.value)


def test_bad_toml_and_missing_file(tmp_path: Path) -> None:
    with pytest.raises(BadInputError, match="not valid TOML"):
        load_gate_config(_write(tmp_path, "[model\nsource="))
    with pytest.raises(BadInputError, match="does not exist"):
        load_gate_config(tmp_path / "none.toml")


def test_torch_source_resolved_against_config_dir(tmp_path: Path) -> None:
    (tmp_path / "net.py").write_text("def build():\n    return None\n")
    (tmp_path / "w.pt").write_bytes(b"x")
    cfg = load_gate_config(_write(tmp_path, '[model]\nsource = "net.py:build"\nweights = "w.pt"\n'
                                            '[verify]\nsynthetic = true\n'))
    assert cfg.source == f"{tmp_path / 'net.py'}:build"
    assert cfg.weights == tmp_path / "w.pt"


def test_booleans_are_not_numbers(tmp_path: Path) -> None:
    # TOML true is a bool; Python's bool is an int subclass, so this must be checked explicitly.
    with pytest.raises(BadInputError, match="opset must be an integer"):
        load_gate_config(_write(tmp_path, '[model]\nsource = "m.keras"\n[export]\nopset = true\n'))


def test_example_config_mentions_every_key() -> None:
    # fixtures/gate_example.toml is the commented reference: every key appears in it, set or commented out.
    from seqgate.gate.config import SECTIONS, section_keys

    text = (FIXTURES / "gate_example.toml").read_text(encoding="utf-8")
    keys = {k for name in SECTIONS for k in section_keys(name)} - {"tolerance", "budget", "call_budget"}
    keys |= {"match", "atol", "rtol", "seq_len", "ms"}
    missing = [k for k in sorted(keys) if f"{k} =" not in text]
    assert not missing, missing
    sections = ("[model]", "[export]", "[verify]", "[[verify.tolerance]]", "[profile]", "[[profile.budget]]",
                "[[profile.call_budget]]")
    for section in sections:
        assert section in text


def test_example_config_shows_the_true_defaults() -> None:
    # every [verify]/[profile] value in the example is the default of seqgate.settings.defaults
    # (the [[...]] tables and the recordings are examples, not defaults)
    import tomllib

    from seqgate.settings import SETTINGS

    data = tomllib.loads((FIXTURES / "gate_example.toml").read_text(encoding="utf-8"))
    for s in SETTINGS:
        if s.key in ("recordings", "tolerance", "budget", "call_budget"):
            continue
        assert s.key in data[s.section], f"[{s.section}] {s.key} missing from the example"
        shown = data[s.section][s.key]
        default = list(s.default) if isinstance(s.default, tuple) else s.default
        assert shown == default, f"[{s.section}] {s.key}: example {shown!r}, default {default!r}"
    assert data["export"]["opset"] == 17  # seqgate.export.run.DEFAULT_OPSET


@pytest.mark.parametrize(("body", "piece"), [
    ("[verify]\natol = nan\n", "[verify] atol must be a finite number ≥ 0, got nan"),  # IEEE-754: nan < 0 false
    ("[verify]\nrtol = inf\n", "[verify] rtol must be a finite number ≥ 0, got inf"),
    ('[[verify.tolerance]]\nmatch = "x"\natol = -1.0\n', "[[verify.tolerance]] entry 1: atol must be a finite"),
    ("[[verify.tolerance]]\natol = 1e-3\n", "[[verify.tolerance]] entry 1: match is required"),
    ("[verify]\nseed = -1\n", "[verify] seed must be a seed ≥ 0"),
    ("[profile]\n[[profile.budget]]\nseq_len = 64\nms = inf\n",
     "[[profile.budget]] entry 1: the latency must be a positive, finite number of milliseconds, got inf"),
    ("[profile]\n[[profile.budget]]\nseq_len = 64\n", "[[profile.budget]] entry 1: ms is required"),
    ("[profile]\nmin_time = inf\n", "[profile] min_time must be a finite number of seconds"),
    ("[profile]\nbatch = [1]\n", "[profile] batch is now called batch_sizes"),
    ("[profile]\nseq_lens = [1000000000000]\n", "inputs alone would take about"),
])
def test_config_defects_are_bad_input(tmp_path: Path, body: str, piece: str) -> None:
    text = '[model]\nsource = "m.keras"\n[verify]\nrecordings = ["rec.npz"]\n' + body.replace("[verify]\n", "")
    with pytest.raises(BadInputError) as ei:
        load_gate_config(_write(tmp_path, text))
    assert piece in str(ei.value)
    assert ei.value.exit_code == EXIT_BAD_INPUT


def test_config_values_are_typed(tmp_path: Path) -> None:
    from seqgate.settings import Budget, ToleranceOverride

    cfg = load_gate_config(_write(tmp_path, '[model]\nsource = "m.keras"\n[verify]\nrecordings = ["rec.npz"]\n'
                                            'atol = 0\n[[verify.tolerance]]\nmatch = "a*"\nrtol = 0.5\n'
                                            '[profile]\nseq_lens = [8, 4]\n[[profile.budget]]\nseq_len = 2\n'
                                            'ms = 3\n'))
    assert cfg.tolerances.atol == 0.0 and cfg.tolerances.overrides == (ToleranceOverride("a*", None, 0.5),)
    assert cfg.budgets == (Budget(2, 3.0),) and cfg.seq_lens == (4, 8)
    assert cfg.min_runs == 100 and cfg.min_time == 1.0  # the one default, shared with the command line


def test_non_utf8_config_is_bad_input(tmp_path: Path) -> None:
    p = tmp_path / "gate.toml"
    p.write_bytes(b'[model]\nsource = "\xff.keras"\n')  # 0xff never occurs in UTF-8 (RFC 3629)
    with pytest.raises(BadInputError, match="is not UTF-8 text"):
        load_gate_config(p)
