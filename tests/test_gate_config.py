"""Gate config validation: every problem class reported, all in one message, before heavy work."""

from __future__ import annotations

from pathlib import Path

import pytest

from seqgate.errors import EXIT_BAD_INPUT, BadInputError
from seqgate.gate.config import load_gate_config

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"


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
    assert cfg.recordings == [tmp_path / "rec.npz"]
    assert cfg.opset == 17 and cfg.synthetic is True and cfg.percentile == 99
    assert cfg.profile_enabled is False


def test_example_config_is_valid() -> None:
    cfg = load_gate_config(FIXTURES / "gate_example.toml")
    assert cfg.budgets and cfg.budgets[0].seq_len == 128
    assert cfg.tolerances[0].match == "*/hidden_sequence"


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
        "task must be",
        "atol must be",
        "'rtoll' (did you mean 'rtol'?)",
        "seq_lens must be",
        "percentile must be 50, 90 or 99",
        "ms > 0",
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
    cfg = load_gate_config(_write(tmp_path, '[model]\nsource = "net.py:build"\nweights = "w.pt"\n'))
    assert cfg.source == f"{tmp_path / 'net.py'}:build"
    assert cfg.weights == tmp_path / "w.pt"


def test_booleans_are_not_numbers(tmp_path: Path) -> None:
    # TOML true is a bool; Python's bool is an int subclass, so this must be checked explicitly.
    with pytest.raises(BadInputError, match="opset must be an integer"):
        load_gate_config(_write(tmp_path, '[model]\nsource = "m.keras"\n[export]\nopset = true\n'))


def test_example_config_mentions_every_key() -> None:
    # fixtures/gate_example.toml is the commented reference: every key of the schema appears in it,
    # set or commented out.
    from seqgate.gate.config import _BUDGET_KEYS, _SCHEMA, _TOLERANCE_KEYS

    text = (FIXTURES / "gate_example.toml").read_text(encoding="utf-8")
    keys = {k for table in _SCHEMA.values() for k in table} - {"tolerance", "budget"}
    keys |= set(_TOLERANCE_KEYS) | set(_BUDGET_KEYS)
    missing = [k for k in sorted(keys) if f"{k} =" not in text]
    assert not missing, missing
    sections = ("[model]", "[export]", "[verify]", "[[verify.tolerance]]", "[profile]", "[[profile.budget]]")
    for section in sections:
        assert section in text
