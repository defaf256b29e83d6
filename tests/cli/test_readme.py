"""The README is run, not just read: every command it shows, its Python API example, and the
config and tolerance examples it prints are executed or parsed here.

Commands: every line of a ```bash block. ``seqgate ...`` lines run in order (later ones use the
files earlier ones wrote) in a temporary directory holding a ``fixtures`` symlink to the
repository's fixtures and an empty ``out/``, exactly as a user runs them from the repository
root. A trailing ``# exits N`` states the expected exit code (default 0).
"""

from __future__ import annotations

import itertools
import os
import re
import shlex
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
README = REPO / "README.md"
# lines of a bash block that are neither `seqgate` nor `scripts/` commands; the fixture does these
SETUP_LINES = {"mkdir -p out", "source .venv/bin/activate"}
OUTPUT_OPTIONS = {"-o", "--out", "--out-dir", "--report", "--summary", "--junit", "--csv", "--plot"}


def _blocks() -> list[tuple[str, list[str], bool]]:
    """Fenced blocks as (language, lines, follows_previous_block_directly)."""
    blocks: list[tuple[str, list[str], bool]] = []
    lang: str | None = None
    body: list[str] = []
    gap_is_blank = False
    for line in README.read_text(encoding="utf-8").splitlines():
        if lang is None:
            if line.startswith("```"):
                lang, body = line[3:].strip(), []
            elif line.strip():
                gap_is_blank = False
            continue
        if line.startswith("```"):
            blocks.append((lang, body, gap_is_blank))
            lang, gap_is_blank = None, True
            continue
        body.append(line)
    assert lang is None, "README.md has an unclosed ``` block"
    return blocks


def _expected_code(line: str) -> int:
    m = re.search(r"#\s*exits\s+(\d+)\s*$", line)
    return int(m.group(1)) if m else 0


def _seqgate() -> list[str]:
    exe = REPO / ".venv" / "bin" / "seqgate"
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "seqgate.cli.app"]


def _workdir(tmp_path: Path) -> Path:
    (tmp_path / "fixtures").symlink_to(REPO / "fixtures", target_is_directory=True)
    (tmp_path / "out").mkdir()
    return tmp_path


def _env() -> dict[str, str]:
    return {**os.environ, "TF_CPP_MIN_LOG_LEVEL": "3", "PYTHONHASHSEED": "0"}


def _run_line(line: str, work: Path) -> str:
    """Run one README command line; check it is executable or ran as annotated; return its output."""
    if line.startswith("scripts/"):
        # scripts/setup installs packages, scripts/test runs this whole suite (this file included)
        # and scripts/demo runs both full demo gates, so none is run from here (the demo configs
        # are gated by tests/test_gate.py); the script must exist and be executable.
        script = REPO / line.split()[0]
        assert script.is_file() and os.access(script, os.X_OK), f"README shows {line!r}: not executable"
        return ""
    if not line.startswith("seqgate "):
        assert line in SETUP_LINES, f"README shows a command this test does not run: {line!r}"
        return ""
    args = shlex.split(line, comments=True)
    want = _expected_code(line)
    proc = subprocess.run(_seqgate() + args[1:], cwd=work, capture_output=True, text=True, env=_env(),
                          timeout=300)
    text = proc.stdout + proc.stderr
    assert proc.returncode == want, f"{line}\nexit {proc.returncode}, README says {want}\n{text[-3000:]}"
    assert "Traceback" not in text, f"{line}\n{text[-3000:]}"
    if want == 0:
        for opt, value in itertools.pairwise(args):
            if opt in OUTPUT_OPTIONS:
                assert (work / value).exists(), f"{line}: {value} was not written"
    return text


def test_readme_commands_run_as_shown(tmp_path: Path) -> None:
    """Every command in order, with the stated exit code and no traceback.

    Excerpts: in a ```text block right after a command block, each `wrote ...` and `error: ...`
    line must be what those commands printed (such lines hold only counts, shapes and paths,
    which do not vary by machine; timings and error magnitudes do, so they are not compared).
    """
    work = _workdir(tmp_path)
    blocks = _blocks()
    ran = checked = 0
    for i, (lang, lines, _) in enumerate(blocks):
        if lang != "bash":
            continue
        printed = ""
        for raw in lines:
            line = raw.strip()
            if line and not line.startswith("#"):
                printed += _run_line(line, work)
                ran += line.startswith("seqgate ")
        nxt = blocks[i + 1] if i + 1 < len(blocks) else None
        if nxt is not None and nxt[0] == "text" and nxt[2]:
            for shown in (x for x in nxt[1] if x.startswith(("wrote ", "error: "))):
                assert shown in printed, f"README excerpt not printed by its commands:\n{shown}\n---\n{printed}"
                checked += 1
    assert ran >= 10, f"only {ran} seqgate commands found in README.md"
    assert checked >= 4, f"only {checked} excerpt lines checked"


def test_readme_python_example_runs(tmp_path: Path) -> None:
    work = _workdir(tmp_path)
    code = "\n".join("\n".join(lines) for lang, lines, _ in _blocks() if lang == "python")
    assert "seqgate.export(" in code and "seqgate.gate(" in code
    (work / "example.py").write_text(code, encoding="utf-8")
    proc = subprocess.run([sys.executable, "example.py"], cwd=work, capture_output=True, text=True,
                          env=_env(), timeout=300)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "Traceback" not in proc.stderr
    assert (work / "out" / "api-gate-pressure" / "report.html").is_file()


def _toml_block(first_line_prefix: str) -> str:
    found = [lines for lang, lines, _ in _blocks() if lang == "toml" and lines
             and lines[0].startswith(first_line_prefix)]
    assert len(found) == 1, f"expected one toml block starting {first_line_prefix!r}"
    return "\n".join(found[0]) + "\n"


def test_readme_tolerance_example_means_what_the_text_says(tmp_path: Path) -> None:
    from seqgate.verify.tolerances import load_tolerances

    path = tmp_path / "tolerances.toml"
    path.write_text(_toml_block("atol"), encoding="utf-8")
    tol = load_tolerances(str(path))
    # hand-worked from the README's example and its stated rule: defaults, then every matching
    # [[tolerance]] entry in file order, field by field
    assert tol.for_tensor("gru/l1/forward/hidden_sequence") == (2e-4, 1e-4)
    assert tol.for_tensor("output") == (1e-4, 1e-3)
    assert tol.for_tensor("gru/l0/forward/hidden_final") == (1e-4, 1e-4)
    # --atol sits above the file's top level and below the [[tolerance]] entries
    tol = load_tolerances(str(path), atol=5e-4)
    assert tol.for_tensor("output") == (5e-4, 1e-3)
    assert tol.for_tensor("gru/l1/x") == (2e-4, 1e-4)


def test_readme_shows_the_demo_pressure_config_as_it_is() -> None:
    shown = tomllib.loads(_toml_block("# Release gate for the Millbrook Vale"))
    with open(REPO / "fixtures" / "demo" / "pressure" / "gate.toml", "rb") as f:
        assert shown == tomllib.load(f)


def _reference_rows() -> dict[tuple[str, str], str]:
    """{(section, key): default cell} from the config reference table."""
    rows: dict[tuple[str, str], str] = {}
    for line in README.read_text(encoding="utf-8").splitlines():
        if not line.startswith("| `["):
            continue
        cells = [c.strip() for c in line.strip("|").split("|")]
        names = re.findall(r"`([^`]+)`", cells[0])
        section = re.match(r"\[\[?([\w.]+)\]\]?", names[0])
        assert section, line
        cell = cells[2].split(",") if len(names) > 1 else [cells[2]]
        defaults = [d.strip().strip("`") for d in cell]
        if len(defaults) == 1:
            defaults *= len(names)
        for name, default in zip(names, defaults, strict=True):
            rows[(section.group(1), name.split()[-1])] = default
    return rows


def _expected_config_defaults() -> dict[tuple[str, str], object]:
    """{(section, key): default} from the code: seqgate.settings plus the [model]/[export] keys."""
    from seqgate.export.run import DEFAULT_OPSET
    from seqgate.gate.config import MODEL_KEYS
    from seqgate.settings import SETTINGS

    expected: dict[tuple[str, str], object] = {("model", k): None for k in MODEL_KEYS}
    expected[("model", "untrained")] = False
    expected[("export", "opset")] = DEFAULT_OPSET
    expected[("export", "streaming")] = None
    for st in SETTINGS:
        if st.table:  # the [[...]] tables: their own keys, each required or optional
            continue
        expected[(st.section, st.key)] = list(st.default) if isinstance(st.default, tuple) else st.default
    expected.update({("verify.tolerance", k): None for k in ("match", "atol", "rtol")})
    expected.update({("profile.budget", k): None for k in ("seq_len", "ms")})
    expected.update({("profile.call_budget", k): None for k in ("seq_len", "ms")})
    from seqgate.settings.variants import VARIANT_DEFAULTS

    expected.update({("variants", k): v for k, v in VARIANT_DEFAULTS.items()})
    return expected


def test_readme_config_reference_lists_every_key_with_its_default() -> None:
    rows = _reference_rows()
    expected = _expected_config_defaults()
    assert set(rows) == set(expected), f"missing {set(expected) - set(rows)}, extra {set(rows) - set(expected)}"
    for k, shown in rows.items():
        if shown in ("required", "none", "keep"):
            assert expected[k] is None, f"{k}: README says {shown}, code default {expected[k]!r}"
            continue
        assert tomllib.loads(f"v = {shown}")["v"] == expected[k], f"{k}: README {shown}, code {expected[k]!r}"


def _names_rows() -> list[list[str]]:
    text = README.read_text(encoding="utf-8").split("\n## Names\n", 1)[1].split("\n## ", 1)[0]
    rows = [[c.strip() for c in line.strip().strip("|").split("|")] for line in text.splitlines()
            if line.startswith("| ") and not line.startswith("| concept")]
    return rows


def test_readme_names_table_is_the_settings_table() -> None:
    # one row per setting of seqgate.settings, with its CLI option, config key, JSON field and default
    from seqgate.settings import CONFIG, SETTINGS

    rows = _names_rows()
    assert len(rows) == len(SETTINGS)
    for row, st in zip(rows, SETTINGS, strict=True):
        cli, key, json_field, default = (re.findall(r"`([^`]+)`", c) for c in row[1:5])
        assert key == [st.where(CONFIG)], (row, st)
        assert json_field == [st.json], (row, st)
        if st.cli:
            assert cli[0].split()[0] == st.cli, (row, st)
        want = list(st.default) if isinstance(st.default, tuple) else st.default
        assert tomllib.loads(f"v = {default[0]}")["v"] == want, (row, st)


def test_readme_opens_with_the_job_and_keeps_the_cautions() -> None:
    text = README.read_text(encoding="utf-8")
    first = text.split("\n\n")[1]  # the paragraph after the title
    for word in ("export", "verif", "profil", "gate"):
        assert re.search(rf"\b{word}", first), f"the first paragraph does not mention {word!r}"
    cautions = text.split("## Cautions", 1)
    assert len(cautions) == 2, "README.md has no Cautions section"
    body = " ".join(cautions[1].split())
    for phrase in ("safety-relevant", "target hardware", "standards", "qualified review", "budgets"):
        assert phrase in body, f"the cautions do not mention {phrase!r}"


@pytest.mark.parametrize("section", ["## Two commands", "## Walk-through", "## Gate config reference",
                                     "## Names",
                                     "## Exit codes", "## Reading the report", "## Python API", "## Cautions"])
def test_readme_has_section(section: str) -> None:
    assert f"\n{section}\n" in README.read_text(encoding="utf-8")
